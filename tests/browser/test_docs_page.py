"""The /docs page in a real headless browser: Debian's Chromium driven through its
chromedriver (selenium), against a real server on a loopback port.

`make test` installs Chromium when it is missing and sets ANNUITY_REQUIRE_BROWSER=1, so there
this test runs or fails, never skips; run on its own without Chromium it is skipped.
"""

import json
import os
import shutil
import tempfile
import threading
import time
import urllib.request
from pathlib import Path

import pytest

from service import create_app
from service.api.openapi import CAUTION

CHROMIUM = Path("/usr/bin/chromium")
CHROMEDRIVER = Path("/usr/bin/chromedriver")
OUTPUT = Path(__file__).resolve().parents[2] / "build" / "test-output"
#: Without the background-networking flags Chromium reaches for the network, which a closed
#: machine refuses.
CHROMIUM_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                  "--no-first-run", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync", "--disable-dev-shm-usage",
                  "--window-size=1280,1600")

pytestmark = pytest.mark.browser

if not (CHROMIUM.exists() and CHROMEDRIVER.exists()):
    if os.environ.get("ANNUITY_REQUIRE_BROWSER"):
        pytest.fail(f"ANNUITY_REQUIRE_BROWSER is set but {CHROMIUM} or {CHROMEDRIVER} is "
                    "missing (apt-get install chromium chromium-driver)", pytrace=False)
    pytest.skip(f"no {CHROMIUM} and {CHROMEDRIVER}: apt-get install chromium chromium-driver "
                "(make test does)", allow_module_level=True)

webdriver = pytest.importorskip("selenium.webdriver")
from selenium.webdriver.chrome.service import Service  # noqa: E402
from selenium.webdriver.common.by import By  # noqa: E402
from selenium.webdriver.support import expected_conditions as ec  # noqa: E402
from selenium.webdriver.support.ui import WebDriverWait  # noqa: E402


@pytest.fixture(scope="module")
def server():
    """The service on a free loopback port, served by werkzeug's threaded server."""
    from werkzeug.serving import make_server

    httpd = make_server("127.0.0.1", 0, create_app({"TESTING": True}), threaded=True)
    thread = threading.Thread(target=httpd.serve_forever, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{httpd.server_port}"
    finally:
        httpd.shutdown()
        thread.join(timeout=10)


@pytest.fixture(scope="module")
def browser():
    profile = tempfile.mkdtemp(prefix="annuity-chromium-")
    options = webdriver.ChromeOptions()
    options.binary_location = str(CHROMIUM)
    for flag in (*CHROMIUM_FLAGS, f"--user-data-dir={profile}"):
        options.add_argument(flag)
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(options=options, service=Service(str(CHROMEDRIVER)))
    try:
        yield driver
    finally:
        driver.quit()
        shutil.rmtree(profile, ignore_errors=True)


def _operation_ids(base: str) -> set[str]:
    with urllib.request.urlopen(base + "/openapi.json", timeout=10) as response:
        spec = json.load(response)
    return {op["operationId"] for ops in spec["paths"].values() for op in ops.values()}


def test_docs_page_shows_the_caution_lists_every_operation_and_tries_one(server, browser):
    started = time.monotonic()
    browser.get(server + "/docs")
    wait = WebDriverWait(browser, 30)
    wait.until(ec.presence_of_element_located((By.CSS_SELECTOR, ".opblock")))

    # The caution comes first: the body's first element, above everything else on the page.
    first = browser.execute_script("return document.body.firstElementChild")
    assert first.get_attribute("id") == "caution"
    assert first.text == "Caution. " + CAUTION
    ui = browser.find_element(By.ID, "swagger-ui")
    assert first.rect["y"] < ui.rect["y"] and first.is_displayed()

    # Every operation of /openapi.json is listed (Swagger UI gives each block the id
    # operations-<tag>-<operationId>; the contract has no tags, so the tag is "default").
    listed = {element.get_attribute("id").removeprefix("operations-default-")
              for element in browser.find_elements(By.CSS_SELECTOR, ".opblock")}
    assert listed == _operation_ids(server)

    # Try it out on annuityFactors with its first worked example, as a person would.
    block = browser.find_element(By.ID, "operations-default-annuityFactors")
    block.find_element(By.CSS_SELECTOR, ".opblock-summary").click()
    wait.until(lambda d: block.find_elements(By.CSS_SELECTOR, ".try-out__btn"))
    block.find_element(By.CSS_SELECTOR, ".try-out__btn").click()
    body = wait.until(lambda d: block.find_element(By.CSS_SELECTOR, "textarea.body-param__text"))
    sent = json.loads(body.get_attribute("value"))
    assert sent["basis"] == "fernhollow-annuitants"
    block.find_element(By.CSS_SELECTOR, "button.execute").click()
    status = wait.until(lambda d: block.find_element(
        By.CSS_SELECTOR, ".live-responses-table .response .response-col_status"))
    assert status.text.strip().startswith("200"), status.text
    shown = block.find_element(By.CSS_SELECTOR,
                               ".live-responses-table .response .response-col_description")
    assert "FM-20417" in shown.text and '"valued": 2' in shown.text

    OUTPUT.mkdir(parents=True, exist_ok=True)
    browser.execute_script("arguments[0].scrollIntoView()", status)
    assert browser.save_screenshot(str(OUTPUT / "docs-response.png"))
    browser.execute_script("window.scrollTo(0, 0)")
    assert browser.save_screenshot(str(OUTPUT / "docs.png"))

    # Nothing came from anywhere but this service, and the page's CSP refused nothing.
    loaded = browser.execute_script(
        "return performance.getEntriesByType('resource').map(e => e.name)")
    assert loaded and all(url.startswith(server + "/") for url in loaded), loaded
    console = [entry["message"] for entry in browser.get_log("browser")
               if entry["level"] == "SEVERE" or "Content Security Policy" in entry["message"]]
    assert console == []
    print(f"docs page checked in {time.monotonic() - started:.1f} s")
