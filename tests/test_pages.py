"""The pages for people, in a real browser: headless Chromium (Debian's ``chromium`` and
``chromidriver``, driven by selenium) against a real ``kridge serve`` under gunicorn.

One served store for the module: the demo model ``coating`` trained twice on the process
settings (v1, v2; v2 live), a few predict calls so that the overview has figures to show.
Screenshots land in ``tests/artifacts/`` (ignored by git) for a person to look at.

In CI (``CI`` set, as ``.ci/run`` does) a missing browser is a failure; elsewhere the browser
tests are skipped when Chromium is not installed.
"""

from __future__ import annotations

import os
from pathlib import Path

import html5lib
import pytest
from cli_helpers import kridge
from service_helpers import Gunicorn, metric_count, metric_samples, wait_for

from service.page_data import number

CHROMIUM = "/usr/bin/chromium"
CHROMEDRIVER = "/usr/bin/chromedriver"
#: Flags that keep Chromium quiet and offline on a build machine.
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync")
ARTIFACTS = Path(__file__).resolve().parent / "artifacts"
FEATURES = "oven_temp_c,line_speed_m_min,wet_film_um,humidity_pct,viscosity_mpas"
SECRET = "page-test-token-7c1f0e"
TYPICAL = {"oven_temp_c": 190.0, "line_speed_m_min": 22.0, "wet_film_um": 60.0,
           "humidity_pct": 45.0, "viscosity_mpas": 600.0}

have_browser = os.path.exists(CHROMIUM) and os.path.exists(CHROMEDRIVER)
if not have_browser and os.environ.get("CI"):
    raise RuntimeError(f"CI needs {CHROMIUM} and {CHROMEDRIVER} (apt-get install chromium "
                       "chromium-driver; .ci/run does it)")
browser = pytest.mark.skipif(not have_browser, reason="Chromium and chromedriver not installed")


def run(*args, store: Path) -> None:
    r = kridge(*args, store=store)
    assert r.returncode == 0, r.stderr


@pytest.fixture(scope="module")
def site(tmp_path_factory, demo_csv):
    """coating v1 and v2 (v2 live) served by gunicorn; three predicted rows, one outside."""
    root = tmp_path_factory.mktemp("pages")
    csv = root / "coating_line.csv"  # 300 rows: a real model, quick to train with its report
    csv.write_text("\n".join(demo_csv.read_text().splitlines()[:301]) + "\n")
    store = root / "store"
    for ridge in ("0.1", "0.3"):
        run("train", csv, "--target", "hardness_s,gloss_gu", "--name", "coating",
            "--features", FEATURES, "--kernel", "rbf", "--gamma", "0.2", "--ridge", ridge,
            "--release", store=store)
    env = {"KRIDGE_POLL_SECONDS": "0.1", "KRIDGE_ADMIN_TOKEN": SECRET,
           "PROMETHEUS_MULTIPROC_DIR": str(root / "metrics")}
    with Gunicorn(store, workers=2, env=env) as g:
        rows = [TYPICAL, dict(TYPICAL, humidity_pct=44.0), dict(TYPICAL, oven_temp_c=300.0)]
        assert g.post("/models/coating/predict", json={"rows": rows}).status_code == 200
        g.store = store
        yield g


@pytest.fixture(scope="module")
def driver(tmp_path_factory):
    if not have_browser:
        pytest.skip("Chromium and chromedriver not installed")
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    os.environ.setdefault("SE_OFFLINE", "true")  # selenium must not look for a browser online
    opts = webdriver.ChromeOptions()
    opts.binary_location = CHROMIUM
    for flag in FLAGS:
        opts.add_argument(flag)
    opts.add_argument(f"--user-data-dir={tmp_path_factory.mktemp('chromium-profile')}")
    opts.add_argument("--window-size=1280,900")
    d = webdriver.Chrome(service=Service(CHROMEDRIVER), options=opts)
    d.set_page_load_timeout(30)
    ARTIFACTS.mkdir(exist_ok=True)
    try:
        yield d
    finally:
        d.quit()


def viewport(driver, width: int, height: int = 900) -> None:
    """Set the page's viewport exactly (the window's frame does not count)."""
    driver.execute_cdp_cmd("Emulation.setDeviceMetricsOverride", {
        "width": width, "height": height, "deviceScaleFactor": 1, "mobile": width < 600})


def screenshot(driver, name: str, width: int) -> None:
    """The whole page at ``width`` pixels into tests/artifacts/<name>-<width>.png."""
    viewport(driver, width)
    height = driver.execute_script("return document.documentElement.scrollHeight")
    viewport(driver, width, min(int(height), 4000))
    driver.save_screenshot(str(ARTIFACTS / f"{name}-{width}.png"))
    viewport(driver, width)


def page_urls(site) -> list[str]:
    return ["/", "/page/coating", "/page/coating/try", "/page/coating/try?version=1",
            "/page/coating/try?f0=300&f1=22&f2=60&f3=45&f4=600&coverage=0.9",
            "/page/coating/try?f0=abc&f1=22&f2=60&f3=45&f4=600", "/page/no-such-model"]


# -- the browser --------------------------------------------------------------------------

@browser
def test_overview_lists_the_model_and_its_live_version(site, driver):
    viewport(driver, 1280)
    driver.get(site.base + "/")
    assert driver.title == "Models · kridge"
    row = driver.find_element("xpath", "//tr[th/a[text()='coating']]")
    cells = row.text
    assert "v2" in cells and "since" in cells
    assert "rbf(gamma=0.2)" in cells and "R²" in cells
    # 3 rows were predicted, one with the oven at 300 °C: a third out of range
    assert "33.3 % out of a training range" in cells and "of 3 rows" in cells
    assert "since the service started" not in cells  # the period is in the caption
    caption = driver.find_element("tag name", "caption").text
    assert "predict route since" in caption and "UTC" in caption
    screenshot(driver, "pages-overview", 1280)


@browser
def test_rollback_on_the_command_line_shows_on_reload(site, driver):
    viewport(driver, 1280)
    driver.get(site.base + "/page/coating")
    live_column = driver.find_element("css selector", "table.compare thead th.is-live")
    assert live_column.text == "v2 live"
    run("rollback", "coating", store=site.store)

    def shows_v1():
        driver.get(site.base + "/page/coating")
        return driver.find_element("css selector", "table.compare thead th.is-live").text == (
            "v1 live")

    wait_for(shows_v1, seconds=10, what="v1 marked live after the rollback", interval=0.2)
    lead = driver.find_element("css selector", ".lead").text
    assert lead.startswith("Live: v1 since")
    timeline = driver.find_elements("css selector", ".timeline li")
    assert "rolled back to v1 (from v2)" in timeline[0].text and "live now" in timeline[0].text
    assert "released v2 (v1 was live)" in timeline[1].text
    assert "released v1" in timeline[2].text
    screenshot(driver, "pages-model", 1280)
    screenshot(driver, "pages-model", 390)
    # the service answers with v1 too: the page and the JSON route agree
    wait_for(lambda: site.get("/models/coating").json()["version"] == 1, seconds=10,
             what="served v1")
    driver.get(site.base + "/")
    assert "v1" in driver.find_element("xpath", "//tr[th/a[text()='coating']]").text


@browser
def test_report_link_opens_the_training_report(site, driver):
    viewport(driver, 1280)
    driver.get(site.base + "/page/coating")
    driver.find_element("link text", "Training report (v2)").click()
    wait_for(lambda: "/versions/2/report" in driver.current_url, seconds=10,
             what="the report page", interval=0.2)
    assert "training report" in driver.title
    assert driver.find_elements("css selector", "img[src^='data:image/png']")
    report = site.get("/models/coating/versions/2/report")
    assert report.status_code == 200 and report.headers["Content-Type"].startswith("text/html")
    assert report.content == (site.store / "coating/versions/2/report.html").read_bytes()
    doc = site.get("/openapi.json").json()  # the file route is part of the API document
    op = doc["paths"]["/models/{name}/versions/{version}/report"]["get"]
    assert set(op["responses"]) == {"200", "404"} and "text/html" in op["responses"]["200"][
        "content"]


@browser
def test_try_a_row_out_of_range_names_the_feature(site, driver):
    viewport(driver, 1280)
    driver.get(site.base + "/page/coating")
    driver.find_element("link text", "Try a row").click()
    field = driver.find_element("id", "f0")
    label = driver.find_element("css selector", "label[for='f0']")
    assert label.text == "oven_temp_c"
    assert "training" in driver.find_element("id", "f0-range").text
    field.clear()
    field.send_keys("300")
    driver.find_element("css selector", "form.row-form button[type='submit']").click()
    result = wait_for(lambda: driver.find_elements("css selector", "section.outcome"),
                      seconds=10, what="a result", interval=0.2)[0].text
    assert "Out of range: oven_temp_c = 300 is above its training range" in result
    assert "novelty" in result and "Caution." in result and "extrapolation" in result
    # the same row through the JSON predict route gives the same value and interval
    row = {f: float(driver.find_element("id", f"f{j}").get_attribute("value"))
           for j, f in enumerate(FEATURES.split(","))}
    live = site.get("/models/coating").json()["version"]
    answer = site.post("/models/coating/predict", json={"rows": [row], "coverage": 0.9}).json()
    assert answer["version"] == live
    first = answer["results"][0]
    lo, hi = first["interval"][0]
    assert (f"hardness_s\n{number(first['value'][0], 5)} 90 % interval: "
            f"{number(lo, 5)} to {number(hi, 5)}") in result
    assert "is-outside" in driver.find_element("id", "f0").find_element(
        "xpath", "..").get_attribute("class")
    assert first["envelope"]["out_of_range"].keys() == {"oven_temp_c"}
    screenshot(driver, "pages-try", 1280)
    screenshot(driver, "pages-try", 390)


@browser
def test_every_page_fits_390_pixels(site, driver):
    viewport(driver, 390, 844)
    for url in page_urls(site):
        driver.get(site.base + url)
        assert driver.execute_script("return window.innerWidth") == 390
        width = driver.execute_script("return document.documentElement.scrollWidth")
        assert width <= 390, (url, width)
    driver.get(site.base + "/")
    screenshot(driver, "pages-overview", 390)


# -- HTML, labels, what a page may show ---------------------------------------------------

def test_pages_are_valid_html_with_labelled_inputs(site):
    parser = html5lib.HTMLParser(strict=True, namespaceHTMLElements=False)
    for url in page_urls(site):
        r = site.get(url)
        assert r.headers["Content-Type"] == "text/html; charset=utf-8", url
        doc = parser.parse(r.text)  # raises on any parse error
        ids = [el.get("id") for el in doc.iter() if el.get("id")]
        assert len(ids) == len(set(ids)), url
        labelled = {el.get("for") for el in doc.iter("label")}
        for el in [*doc.iter("input"), *doc.iter("select"), *doc.iter("textarea")]:
            if el.get("type") == "hidden":
                continue
            assert el.get("id") in labelled, (url, el.attrib)
        assert doc.find(".//script") is None, url  # works without JavaScript
        for el in doc.iter():
            for attr in ("src", "href", "action"):
                link = el.get(attr) or ""
                assert not link.startswith(("http:", "https:", "//")), (url, link)


def test_pages_show_no_store_path_or_secret_and_unknown_is_404(site):
    store = str(site.store)
    for url in page_urls(site):
        body = site.get(url).text
        assert store not in body and SECRET not in body and "Traceback" not in body, url
    missing = site.get("/page/no-such-model")
    assert missing.status_code == 404 and "no model named" in missing.text
    bad_name = site.get("/page/..%2Fetc")
    assert bad_name.status_code == 404
    assert site.get("/page/coating/try?version=99").status_code == 404
    # the report route serves the one report file of a listed version, never a path
    for path in ("/models/coating/versions/99/report", "/models/coating/versions/x/report",
                 "/models/..%2F..%2Fetc/versions/1/report", "/models/nope/versions/1/report",
                 "/models/coating/versions/1/report.html/../manifest.json"):
        r = site.get(path)
        assert r.status_code == 404, path
        if r.headers["Content-Type"].startswith("application/json"):
            assert store not in r.text and r.json()["error"]["code"]
    page = site.get("/page/coating")
    assert "default-src 'none'" in page.headers["Content-Security-Policy"]
    assert "script-src" not in page.headers["Content-Security-Policy"]  # none: default-src


def _rows_predicted(site) -> float:
    samples = metric_samples(site.get("/metrics").text)
    return metric_count(samples, "kridge_rows_predicted_total", model="coating")


def test_pages_change_nothing(site):
    model = site.store / "coating"
    before = {p: p.read_bytes() for p in (model / "live.json", model / "history.jsonl")}
    counted = _rows_predicted(site)
    assert counted >= 3  # the fixture's rows are counted …
    for url in page_urls(site):
        assert site.get(url).status_code in (200, 404)
    assert _rows_predicted(site) == counted  # … rows tried on the page are not
    for url in ("/", "/page/coating", "/page/coating/try"):
        r = site.post(url, data={"f0": "1"})
        assert r.status_code == 405, url
    assert {p: p.read_bytes() for p in before} == before
