"""The preview page at `/`, driven in headless Debian chromium against a real uvicorn server.

Needs /usr/bin/chromium and /usr/bin/chromedriver (`make test` installs them when missing, see
.ci/browser.sh); skipped with the reason otherwise. Screenshots go to tests/artifacts/.
"""

from __future__ import annotations

import contextlib
import datetime
import hashlib
import json
import os
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
ARTIFACTS = Path(__file__).with_name("artifacts")
CHROMIUM = "/usr/bin/chromium"
CHROMEDRIVER = "/usr/bin/chromedriver"

webdriver = pytest.importorskip("selenium.webdriver")
if not (os.path.exists(CHROMIUM) and os.path.exists(CHROMEDRIVER)):
    pytest.skip("chromium/chromedriver not installed (apt-get install chromium chromium-driver)",
                allow_module_level=True)

from selenium.webdriver.common.action_chains import ActionChains  # noqa: E402
from selenium.webdriver.common.by import By  # noqa: E402
from selenium.webdriver.common.keys import Keys  # noqa: E402
from selenium.webdriver.support.ui import Select, WebDriverWait  # noqa: E402


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@contextlib.contextmanager
def serving(root: Path, config_text: str):
    """uvicorn on a free 127.0.0.1 port with `config_text` as SLUICE_CONFIG; yields the base URL."""
    import httpx

    cfg = root / "sluice.toml"
    cfg.write_text(config_text)
    port = _free_port()
    env = {k: v for k, v in os.environ.items() if not k.startswith("SLUICE_")}
    env["SLUICE_CONFIG"] = str(cfg)
    log = open(root / "server.log", "wb")
    proc = subprocess.Popen([sys.executable, "-m", "uvicorn", "app.main:app", "--host", "127.0.0.1",
                             "--port", str(port), "--no-access-log"],
                            cwd=REPO, env=env, stdout=log, stderr=subprocess.STDOUT)
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 30
        while True:
            assert proc.poll() is None, (root / "server.log").read_text()[-3000:]
            try:
                if httpx.get(base + "/healthz", timeout=1).status_code == 200:
                    break
            except httpx.HTTPError:
                pass
            assert time.monotonic() < deadline, "server did not answer /healthz within 30 s"
            time.sleep(0.1)
        yield base
    finally:
        proc.terminate()
        try:
            proc.wait(10)
        except subprocess.TimeoutExpired:
            proc.kill()
        log.close()


DEMO_SOURCE = '[sources.deliveries]\nengine = "duckdb"\npath = "{db}"\ntable = "deliveries"\n'


@pytest.fixture(scope="module")
def demo_db(tmp_path_factory) -> Path:
    from app.demo import build_demo

    db = tmp_path_factory.mktemp("browser") / "demo.duckdb"
    build_demo(db, rows=50_000, progress=False)
    return db


@pytest.fixture(scope="module")
def server(demo_db):
    with serving(demo_db.parent, DEMO_SOURCE.format(db=demo_db)) as base:
        yield base


@pytest.fixture(scope="module")
def browser(tmp_path_factory):
    from selenium.webdriver.chrome.options import Options
    from selenium.webdriver.chrome.service import Service

    os.environ.setdefault("SE_OFFLINE", "true")  # never let Selenium Manager reach the network
    opts = Options()
    opts.binary_location = CHROMIUM
    for flag in ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync",
                 "--disable-dev-shm-usage", "--window-size=1300,1150",
                 f"--user-data-dir={tmp_path_factory.mktemp('chromium-profile')}"):
        opts.add_argument(flag)
    driver = webdriver.Chrome(options=opts, service=Service(CHROMEDRIVER))
    driver.set_page_load_timeout(30)
    try:
        yield driver
    finally:
        driver.quit()


def wait_state(driver, state: str, timeout: float = 30) -> None:
    WebDriverWait(driver, timeout).until(
        lambda d: d.execute_script("return document.body.dataset.state") == state,
        f"page did not reach state {state!r}")


def run_request(driver, body: dict | None = None) -> dict:
    """Put `body` in the textarea (or keep what is there), press Run, return the request sent."""
    if body is not None:
        driver.execute_script("document.getElementById('request').value = arguments[0]",
                              json.dumps(body, indent=2))
    driver.execute_script("document.body.dataset.state = 'running'")
    driver.find_element(By.ID, "run").click()
    WebDriverWait(driver, 30).until(
        lambda d: d.execute_script("return document.body.dataset.state") in ("done", "problem"))
    return json.loads(driver.find_element(By.ID, "request").get_property("value"))


def answer(base: str, body: dict) -> dict:
    import httpx

    r = httpx.post(base + "/v1/chart", json=body, timeout=30)
    assert r.status_code == 200, r.text
    return r.json()


def marks(driver) -> list:
    return driver.find_elements(By.CSS_SELECTOR, "#chart [data-mark]")


def shot(driver, name: str) -> Path:
    ARTIFACTS.mkdir(exist_ok=True)
    path = ARTIFACTS / name
    driver.save_screenshot(str(path))
    assert path.stat().st_size > 10_000
    return path


def test_page_loads_sources_and_columns(server, browser):
    browser.get(server + "/")
    wait_state(browser, "ready")
    sel = Select(browser.find_element(By.ID, "source"))
    assert sel.first_selected_option.get_attribute("value") == "deliveries"
    cols = [b.get_attribute("data-column") for b in browser.find_elements(By.CSS_SELECTOR, "#columns button")]
    assert {"distance_km", "delivered_at", "depot", "vehicle"} <= set(cols)
    assert "50,000 rows" in browser.find_element(By.ID, "source-info").text
    body = json.loads(browser.find_element(By.ID, "request").get_property("value"))
    assert body["source"] == "deliveries"
    # no request left this page for anywhere but our server
    hosts = browser.execute_script(
        "return performance.getEntriesByType('resource').map(e => new URL(e.name).host)")
    assert set(hosts) <= {server.removeprefix("http://")}


def test_run_default_request_draws_one_bar_per_row(server, browser):
    browser.get(server + "/")
    wait_state(browser, "ready")
    body = run_request(browser)
    expected = answer(server, body)
    n = expected["stats"]["result_rows"]
    assert n > 5
    drawn = marks(browser)
    assert len(drawn) == n
    assert {m.get_attribute("data-mark") for m in drawn} == {"bar"}
    assert int(browser.find_element(By.ID, "chart").get_attribute("data-result-rows")) == n
    sql = browser.find_element(By.ID, "sql").text
    # the page lays the SQL out on several lines; the words are the answer's, unchanged
    assert "SELECT" in sql and "".join(sql.split()) == "".join(
        "".join(s.rstrip(";") + ";" for s in expected["sql"]).split())
    assert len(browser.find_elements(By.CSS_SELECTOR, "#result tr")) == n + 1
    # bars sit inside the plot and have real widths
    widths = [float(m.get_attribute("width")) for m in drawn]
    assert min(widths) > 5
    shot(browser, "preview_histogram.png")


@pytest.mark.parametrize("label, kind, picture", [
    ("Parcels per week by vehicle (lines)", "point", "preview_lines.png"),
    ("Hour by weekday, local time (heat cells)", "cell", "preview_heat.png"),
    ("Distance by weight (binned heat cells)", "cell", "preview_heat_binned.png"),
    ("Mean fee against mean distance per depot and vehicle (points)", "point", "preview_points.png"),
    ("Delay of every June parcel, M4-reduced to 700 px (line)", "point", "preview_m4.png"),
    ("Parcels per depot, stacked by vehicle (bars)", "bar", "preview_stacked.png"),
])
def test_examples_draw_as_many_marks_as_rows(server, browser, label, kind, picture):
    browser.get(server + "/")
    wait_state(browser, "ready")
    Select(browser.find_element(By.ID, "examples")).select_by_visible_text(label)
    body = run_request(browser)
    n = answer(server, body)["stats"]["result_rows"]
    drawn = marks(browser)
    assert len(drawn) == n > 0
    assert {m.get_attribute("data-mark") for m in drawn} == {kind}
    if picture:
        shot(browser, picture)


def test_problem_shows_pointer_and_suggestions(server, browser):
    browser.get(server + "/")
    wait_state(browser, "ready")
    run_request(browser, {"source": "deliveries",
                          "channels": {"x": {"column": "distnce_km", "bin": {}}, "y": {"agg": "count"}}})
    box = browser.find_element(By.ID, "problem")
    assert box.is_displayed()
    assert "/channels/x/column" in [c.text for c in box.find_elements(By.CSS_SELECTOR, "code.pointer")]
    assert "distance_km" in box.text  # nearest valid name
    assert '"distnce_km"' in box.text  # the offending value, found through the pointer
    assert marks(browser) == []
    shot(browser, "preview_problem.png")


def test_rows_with_null_measures_still_get_a_mark(server, browser):
    """empty_bins: "null" adds bins whose measure is null; each is drawn as a hollow mark."""
    browser.get(server + "/")
    wait_state(browser, "ready")
    body = run_request(browser, {
        "source": "deliveries",
        "channels": {"x": {"column": "distance_km", "bin": {"width": 1, "limits": [0, 40]}},
                     "y": {"agg": "avg", "column": "delay_min"}},
        "where": [{"column": "vehicle", "eq": "bike"}],
        "empty_bins": "null"})
    data = answer(server, body)
    nulls = sum(v is None for v in data["data"]["avg_delay_min"])
    assert nulls > 0
    drawn = marks(browser)
    assert len(drawn) == data["stats"]["result_rows"]
    assert len(browser.find_elements(By.CSS_SELECTOR, "#chart [data-null='true']")) == nulls
    shot(browser, "preview_null_bins.png")


def test_api_key_asked_for_when_the_server_wants_one(demo_db, browser, tmp_path):
    key = "preview-test-key-0123456789"
    cfg = DEMO_SOURCE.format(db=demo_db) + (
        f'\n[[keys]]\nname = "preview"\nhash = "sha256:{hashlib.sha256(key.encode()).hexdigest()}"\n'
        'sources = ["deliveries"]\n')
    with serving(tmp_path, cfg) as base:
        browser.get(base + "/")  # the page itself is open
        wait_state(browser, "ready")
        assert browser.find_element(By.ID, "key-box").get_attribute("open") is not None  # 401 opened it
        assert browser.find_elements(By.CSS_SELECTOR, "#source option") == []
        field = browser.find_element(By.ID, "apikey")
        field.send_keys(key)
        browser.execute_script("arguments[0].dispatchEvent(new Event('change'))", field)
        WebDriverWait(browser, 20).until(
            lambda d: len(d.find_elements(By.CSS_SELECTOR, "#columns button")) > 5)
        body = run_request(browser)
        import httpx

        r = httpx.post(base + "/v1/chart", json=body, headers={"X-API-Key": key}, timeout=30)
        assert len(marks(browser)) == r.json()["stats"]["result_rows"] > 0


@pytest.mark.parametrize("channels, extra", [
    ({"y": {"column": "depot"}, "x": {"agg": "count"}, "color": {"column": "region"}}, {"stack": "sum"}),
    ({"y": {"column": "vehicle"}, "x": {"agg": "avg", "column": "fee"}}, {}),
    ({"x": {"agg": "count"}}, {}),
    ({"color": {"column": "region"}, "size": {"agg": "sum", "column": "fee"}}, {}),
    ({"x": {"column": "distance_km", "bin": {"bins": 8}}, "y": {"agg": "count"}}, {"facet": {"row": {"column": "region"}}}),
])
def test_other_shapes_still_draw_one_mark_per_row(server, browser, channels, extra, request):
    browser.get(server + "/")
    wait_state(browser, "ready")
    body = run_request(browser, {"source": "deliveries", "channels": channels, **extra})
    assert browser.execute_script("return document.body.dataset.state") == "done"
    n = answer(server, body)["stats"]["result_rows"]
    assert len(marks(browser)) == n > 0
    shot(browser, f"preview_shape_{request.node.callspec.indices['channels']}.png")


# --- small multiples, limits, cache, keyboard, live region, narrow screens -----------------

def facet_cells(driver) -> list[dict]:
    """Every drawn facet cell: its facet values, its frame, the rows of its marks, and
    whether its marks and title lie inside the frame."""
    return driver.execute_script("""
        const within = (b, r) => b.left >= r.left - 1 && b.right <= r.right + 1
                                 && b.top >= r.top - 1 && b.bottom <= r.bottom + 1;
        return [...document.querySelectorAll('#chart .facet-cell')].map(g => {
          const r = g.querySelector('.facet-frame').getBoundingClientRect();
          const ms = [...g.querySelectorAll('[data-mark]')];
          return {row: g.dataset.facetRow, col: g.dataset.facetCol,
                  box: [r.left, r.top, r.right, r.bottom],
                  marks: ms.map(m => +m.dataset.row),
                  inside: ms.every(m => within(m.getBoundingClientRect(), r)),
                  title_inside: within(g.querySelector('.facet-title').getBoundingClientRect(), r),
                  ticks_inside: [...g.querySelectorAll('.axis text')].every(
                    t => within(t.getBoundingClientRect(), r))};
        });""")


def _overlap(a, b) -> bool:
    return a[0] < b[2] - 1 and b[0] < a[2] - 1 and a[1] < b[3] - 1 and b[1] < a[3] - 1


@pytest.mark.parametrize("facet, picture", [
    ({"row": {"column": "region"}}, "preview_facet_rows.png"),
    ({"row": {"column": "region"}, "col": {"column": "vehicle"}}, "preview_facet_grid.png"),
])
def test_facets_are_small_multiples(server, browser, facet, picture):
    browser.get(server + "/")
    wait_state(browser, "ready")
    body = run_request(browser, {"source": "deliveries", "facet": facet,
                                 "channels": {"x": {"column": "distance_km", "bin": {"bins": 10, "limits": [0, 50]}},
                                              "y": {"agg": "count"}}})
    shot(browser, picture)
    data = answer(server, body)
    names = {c["channel"]: c["name"] for c in data["columns"] if c["channel"] in ("row", "col")}
    keys = [tuple(str(data["data"][names[f]][i]) if f in names else "" for f in ("row", "col"))
            for i in range(data["stats"]["result_rows"])]
    cells = facet_cells(browser)
    # one cell per facet value (pair) in the answer, each with the marks of its own rows
    assert sorted((c["row"], c["col"]) for c in cells) == sorted(set(keys))
    for c in cells:
        want = [i for i, k in enumerate(keys) if k == (c["row"], c["col"])]
        assert sorted(c["marks"]) == want
        assert c["inside"] and c["title_inside"] and c["ticks_inside"], c  # nothing leaks out
    assert sum(len(c["marks"]) for c in cells) == len(marks(browser)) == len(keys)
    for i, a in enumerate(cells):  # small multiples: no cell is drawn over another
        for b in cells[i + 1:]:
            assert not _overlap(a["box"], b["box"]), (a, b)
    # the same scales in every cell: the x tick labels are the same
    ticks = browser.execute_script("""return [...document.querySelectorAll('#chart .facet-cell')].map(
        g => [...g.querySelectorAll('.axis')][0].textContent)""")
    assert len(set(ticks)) == 1


def test_rows_outside_limits_are_said(server, browser):
    browser.get(server + "/")
    wait_state(browser, "ready")
    body = run_request(browser, {"source": "deliveries", "channels": {
        "x": {"column": "distance_km", "bin": {"width": 2, "origin": 0, "limits": [0, 20]}}, "y": {"agg": "count"}}})
    out = answer(server, body)["stats"]["outside_limits"]["x"]
    assert out > 0
    text = f"{out:,} rows outside the x limits"
    assert text in browser.find_element(By.ID, "legend").text
    assert text in browser.find_element(By.ID, "status").text


def test_cache_hit_status_says_cached(server, browser):
    browser.get(server + "/")
    wait_state(browser, "ready")
    req = {"source": "deliveries", "channels": {"x": {"column": "region"}, "y": {"agg": "sum", "column": "fee"}}}
    run_request(browser, req)
    first = browser.find_element(By.ID, "status").text
    run_request(browser, req)
    second = browser.find_element(By.ID, "status").text
    assert "cached answer (lookup" in second and "null" not in second and "engine" not in second, second
    assert "engine" in first or "cached" in first


def test_column_list_is_reachable_by_keyboard(server, browser):
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.keys import Keys

    browser.get(server + "/")
    wait_state(browser, "ready")
    browser.execute_script("document.getElementById('request').value = '';"
                           "document.getElementById('source').focus()")
    for _ in range(12):  # Tab from the source picker until a column button has the focus
        if browser.execute_script("return !!document.activeElement.closest('#columns')"):
            break
        ActionChains(browser).send_keys(Keys.TAB).perform()
    focused = browser.switch_to.active_element
    assert focused.tag_name == "button" and focused.get_attribute("data-column"), "Tab never reached a column"
    name = focused.get_attribute("data-column")
    ActionChains(browser).send_keys(Keys.ENTER).perform()
    assert browser.find_element(By.ID, "request").get_property("value") == json.dumps(name)
    # Space on the next column works too (a native button)
    browser.execute_script("document.querySelectorAll('#columns button')[1].focus()")
    second = browser.switch_to.active_element.get_attribute("data-column")
    ActionChains(browser).send_keys(Keys.SPACE).perform()
    assert json.dumps(second) in browser.find_element(By.ID, "request").get_property("value")


def test_results_and_errors_are_announced(server, browser):
    browser.get(server + "/")
    wait_state(browser, "ready")
    live = browser.find_element(By.CSS_SELECTOR, "[aria-live]")
    assert live.get_attribute("aria-live") == "polite" and live.get_attribute("role") == "status"
    before = live.text
    body = run_request(browser)
    after = live.text
    n = answer(server, body)["stats"]["result_rows"]
    assert after != before and f"{n:,} rows" in after
    run_request(browser, {"source": "deliveries", "channels": {"x": {"column": "depott"}}})
    err = live.text
    assert err != after and "Error 422" in err and "/channels/x/column" in err


def test_chart_text_is_readable_at_420_px(server, browser):
    browser.set_window_size(420, 1000)
    try:
        browser.get(server + "/")
        wait_state(browser, "ready")
        shot(browser, "preview_420_page.png")
        for body, picture in [(None, "preview_420_histogram.png"),
                              ({"source": "deliveries", "facet": {"row": {"column": "region"}},
                                "channels": {"x": {"column": "vehicle"}, "y": {"agg": "count"}}},
                               "preview_420_facets.png")]:
            run_request(browser, body)
            sizes = browser.execute_script("""
                return [...document.querySelectorAll('#chart .axis text, #chart .facet-title')].map(t =>
                  parseFloat(getComputedStyle(t).fontSize) * t.getScreenCTM().a)""")
            assert sizes and min(sizes) >= 10, sizes  # rendered px (font size x SVG scale)
            width = browser.execute_script("return document.documentElement.scrollWidth")
            assert width <= 420, width  # nothing wider than the screen
            browser.execute_script("document.getElementById('figure').scrollIntoView()")
            shot(browser, picture)
    finally:
        browser.set_window_size(1300, 1150)


# --- linked charts (dashboard.js): one /v1/batch per change ---------------------------------

def _js(v) -> str:
    """A value as JavaScript's String() writes it (the page's data-key / data-value)."""
    if v is None:
        return "null"
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float) and v.is_integer():
        return str(int(v))
    return str(v)


def answer_rows(res: dict) -> list[tuple[str, str]]:
    """(x key, measure) per row of a chart answer, sorted."""
    key = next(c["name"] for c in res["columns"] if c["channel"] == "x" and c["role"] in ("key", "bin_lo"))
    measure = next(c["name"] for c in res["columns"] if c["role"] == "measure")
    return sorted(zip(map(_js, res["data"][key]), map(_js, res["data"][measure])))


def drawn_rows(driver, chart: str) -> list[tuple[str, str]]:
    got = driver.execute_script("""
        return [...document.querySelectorAll(`.dash-card[data-chart="${arguments[0]}"] [data-mark]`)]
          .map(m => [m.dataset.key, m.dataset.value])""", chart)
    return sorted(map(tuple, got))


def wait_dashboard(driver) -> dict:
    """Wait until the newest batch of the page is drawn; the request it sent and its answer."""
    WebDriverWait(driver, 30).until(lambda d: d.execute_script(
        "const b = document.getElementById('dashboard');"
        "return b.dataset.state === 'done' && +b.dataset.seq === DASH.seq"), "dashboard not drawn")
    return driver.execute_script("return {request: DASH.lastRequest, answer: DASH.lastAnswer}")


def open_dashboard(driver, server) -> dict:
    driver.get(server + "/")
    wait_state(driver, "ready")
    driver.find_element(By.ID, "mode").click()
    assert driver.find_element(By.ID, "dashboard").is_displayed()
    assert not driver.find_element(By.ID, "single").is_displayed()
    return wait_dashboard(driver)


def alone(server: str, request: dict, chart_id: str, where: list) -> dict:
    """The chart of the batch asked on its own through /v1/chart, `where` added: the answer
    README says a batch chart equals (the linking done by hand, not by planner.linked)."""
    chart = next(c for c in request["charts"] if c["id"] == chart_id)
    return answer(server, {"source": request["source"], "channels": chart["channels"], "where": where})


def check_drawn(driver, server, request, answer_, wheres: dict) -> None:
    """Every chart: its marks are its rows in the batch answer (count and values), and that
    answer is the chart's own /v1/chart answer with the other charts' brushes as `where`.
    Both sides are the service (this checks the page's drawing and its linking); the rows
    themselves are checked against pandas in tests/test_linked.py."""
    for res in answer_["results"]:
        cid = res["id"]
        assert len(drawn_rows(driver, cid)) == res["stats"]["result_rows"] > 0, cid
        assert drawn_rows(driver, cid) == answer_rows(res), cid
        assert answer_rows(res) == answer_rows(alone(server, request, cid, wheres.get(cid, []))), cid


def test_linked_charts_drag_brushes_the_others_and_clear_restores(server, browser):
    state = open_dashboard(browser, server)
    request, first = state["request"], state["answer"]
    assert [c["id"] for c in request["charts"]] == ["distance", "weekly", "vehicles", "regions"]
    assert all("brush" not in c for c in request["charts"]) and request["session"].startswith("preview-")
    check_drawn(browser, server, request, first, {})
    unbrushed = {res["id"]: answer_rows(res) for res in first["results"]}

    # drag across the left part of the distance histogram
    overlay = browser.find_element(By.CSS_SELECTOR, '.dash-card[data-chart="distance"] .overlay')
    w = overlay.rect["width"]
    ActionChains(browser).move_to_element_with_offset(overlay, int(-0.42 * w), 0).click_and_hold() \
        .move_by_offset(int(0.1 * w), 0).move_by_offset(int(0.1 * w), 0).move_by_offset(int(0.05 * w), 0) \
        .release().perform()
    state = wait_dashboard(browser)
    assert not browser.find_element(By.ID, "dash-problem").is_displayed()  # a 409 is quiet
    print("batches sent by the page so far:", browser.execute_script("return [DASH.sent, DASH.superseded]"))
    request, brushed = state["request"], state["answer"]
    brush = next(c for c in request["charts"] if c["id"] == "distance")["brush"]
    assert len(brush) == 1 and brush[0]["column"] == "distance_km"
    lo, hi = brush[0]["gte"], brush[0]["lt"]
    # snapped to the 5 km bin edges, inside the limits, at least one bin wide
    assert lo % 5 == 0 and hi % 5 == 0 and 0 <= lo < hi <= 40, brush
    box = browser.find_element(By.CSS_SELECTOR, '.dash-card[data-chart="distance"] rect.brush')
    assert (float(box.get_attribute("data-lo")), float(box.get_attribute("data-hi"))) == (lo, hi)
    by_id = {res["id"]: res for res in brushed["results"]}
    assert by_id["distance"]["brushes"] == []
    assert all(by_id[c]["brushes"] == ["distance"] for c in ("weekly", "vehicles", "regions"))
    check_drawn(browser, server, request, brushed,
                {c: brush for c in ("weekly", "vehicles", "regions")})
    # the brushing chart keeps its whole distribution; the others changed
    assert drawn_rows(browser, "distance") == unbrushed["distance"]
    assert drawn_rows(browser, "vehicles") != unbrushed["vehicles"]
    assert "distance_km from" in browser.find_element(By.CSS_SELECTOR, '.dash-card[data-chart="distance"] .selection').text
    assert "filtered by distance" in browser.find_element(By.ID, "dash-status").text
    browser.execute_script("document.getElementById('dashboard').scrollIntoView()")
    shot(browser, "preview_linked_drag.png")

    # a burst of brushes (as a fast drag sends): whichever answers come back, and in whatever
    # order, only the newest is drawn; superseded ones (409) leave no trace on the page
    browser.execute_script("""
        const card = DASH.cards.get('distance');
        for (let k = 1; k <= 8; k++) { card.range = [0, 5 * k]; dashChanged(card); }""")
    state = wait_dashboard(browser)
    assert not browser.find_element(By.ID, "dash-problem").is_displayed()
    brush = next(c for c in state["request"]["charts"] if c["id"] == "distance")["brush"]
    assert brush == [{"column": "distance_km", "gte": 0, "lt": 40}]
    check_drawn(browser, server, state["request"], state["answer"],
                {c: brush for c in ("weekly", "vehicles", "regions")})
    print("batches sent, 409 superseded:", browser.execute_script("return [DASH.sent, DASH.superseded]"))

    browser.find_element(By.CSS_SELECTOR, '.dash-card[data-chart="distance"] button.clear').click()
    state = wait_dashboard(browser)
    assert all("brush" not in c for c in state["request"]["charts"])
    assert browser.find_elements(By.CSS_SELECTOR, '.dash-card[data-chart="distance"] rect.brush') == []
    for cid, rows in unbrushed.items():
        assert drawn_rows(browser, cid) == rows, cid


def test_linked_charts_click_categories_and_keyboard(server, browser):
    open_dashboard(browser, server)
    bars = browser.find_elements(By.CSS_SELECTOR, '.dash-card[data-chart="vehicles"] [data-mark]')
    names = [b.get_attribute("data-key") for b in bars]
    bars[0].click()
    wait_dashboard(browser)
    bars = browser.find_elements(By.CSS_SELECTOR, '.dash-card[data-chart="vehicles"] [data-mark]')
    next(b for b in bars if b.get_attribute("data-key") == names[1]).click()
    state = wait_dashboard(browser)
    brush = next(c for c in state["request"]["charts"] if c["id"] == "vehicles")["brush"]
    assert brush == [{"column": "vehicle", "in": names[:2]}]
    check_drawn(browser, server, state["request"], state["answer"],
                {c: brush for c in ("distance", "weekly", "regions")})
    picked = browser.execute_script("""return [...document.querySelectorAll(
        '.dash-card[data-chart="vehicles"] [data-mark]')].map(m => [m.dataset.key, m.dataset.picked])""")
    assert {k: p == "true" for k, p in picked} == {k: k in names[:2] for k in names}

    # keyboard only: a one-week range on the time line, widened by a week, then Escape
    svg = browser.find_element(By.CSS_SELECTOR, '.dash-card[data-chart="weekly"] svg')
    browser.execute_script("arguments[0].focus()", svg)
    ActionChains(browser).send_keys(Keys.ARROW_RIGHT).perform()
    wait_dashboard(browser)
    ActionChains(browser).key_down(Keys.SHIFT).send_keys(Keys.ARROW_RIGHT).key_up(Keys.SHIFT).perform()
    state = wait_dashboard(browser)
    week = next(c for c in state["request"]["charts"] if c["id"] == "weekly")["brush"]
    assert week[0]["column"] == "delivered_at"
    days = (datetime.date.fromisoformat(week[0]["lt"]) - datetime.date.fromisoformat(week[0]["gte"])).days
    assert days == 14, week
    check_drawn(browser, server, state["request"], state["answer"],
                {"distance": brush + week, "regions": brush + week, "vehicles": week, "weekly": brush})
    ActionChains(browser).send_keys(Keys.ESCAPE).perform()
    state = wait_dashboard(browser)
    assert "brush" not in next(c for c in state["request"]["charts"] if c["id"] == "weekly")
    shot(browser, "preview_linked_categories.png")


def test_linked_charts_fit_a_420_px_screen(server, browser):
    browser.set_window_size(420, 1000)
    try:
        state = open_dashboard(browser, server)
        for res in state["answer"]["results"]:
            assert drawn_rows(browser, res["id"]) == answer_rows(res), res["id"]
        width = browser.execute_script("return document.documentElement.scrollWidth")
        assert width <= 420, width  # one chart per row, nothing wider than the screen
        shot(browser, "preview_linked_420.png")
    finally:
        browser.set_window_size(1300, 1150)
