"""The console in a real browser: headless Chromium (Debian's ``chromium`` and ``chromium-driver``, driven
through Selenium's WebDriver) on a real ``segscore serve --demo`` process.

Asserted through the browser: every chart image loaded (``naturalWidth`` > 0, and at least 800 px wide),
the segment table has k rows (k from the version's fit report over HTTP), and with API keys the login form
comes first and the images load on the session cookie. The full-page screenshot is kept under
``test-artifacts/`` (git-ignored).

Without Chromium this test skips, naming what is missing, except in CI (``CI=true``), where it fails:
``.ci/run`` installs both packages.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest

from tests.conftest import create_keys, png_size
from tests.serving import get_json, segscore_server

ARTIFACTS = Path(__file__).resolve().parents[2] / "test-artifacts"
PAGE_LOAD_SECONDS = 120          # the first view draws four charts; the machine may be busy
CHROMIUM_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                  "--disable-background-networking", "--disable-component-update", "--disable-sync",
                  "--hide-scrollbars", "--window-size=1280,1000")

IMAGES = "return Array.from(document.images).map(i => [i.getAttribute('src'), i.complete, i.naturalWidth]);"
SEGMENT_ROWS = "return document.querySelectorAll('#segments tbody tr').length;"


def browser_paths() -> tuple[str, str]:
    chromium, driver = shutil.which("chromium"), shutil.which("chromedriver")
    if chromium and driver:
        return chromium, driver
    missing = [name for name, path in (("chromium", chromium), ("chromedriver", driver)) if path is None]
    reason = (f"{' and '.join(missing)} not found: install Debian's chromium and chromium-driver packages "
              "(.ci/run does so)")
    if os.environ.get("CI") == "true":
        pytest.fail(f"CI must run the browser test; {reason}")
    pytest.skip(reason)


@pytest.fixture
def browser(tmp_path):
    chromium, driver_path = browser_paths()
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    options = webdriver.ChromeOptions()
    options.binary_location = chromium
    for flag in (*CHROMIUM_FLAGS, f"--user-data-dir={tmp_path / 'chromium-profile'}"):
        options.add_argument(flag)
    driver = webdriver.Chrome(service=Service(driver_path), options=options)
    driver.set_page_load_timeout(PAGE_LOAD_SECONDS)
    try:
        yield driver
    finally:
        driver.quit()


def wait_for_images(driver) -> list[list]:
    from selenium.webdriver.support.ui import WebDriverWait

    WebDriverWait(driver, PAGE_LOAD_SECONDS).until(
        lambda d: d.execute_script("return Array.from(document.images).every(i => i.complete);"))
    return driver.execute_script(IMAGES)


def save_full_page(driver, name: str) -> Path:
    height = driver.execute_script("return document.documentElement.scrollHeight;")
    driver.set_window_size(1280, height)
    ARTIFACTS.mkdir(exist_ok=True)
    path = ARTIFACTS / name
    assert driver.save_screenshot(str(path))
    return path


def test_console_in_chromium_open_then_behind_a_key(browser, tmp_path):
    """One test and one server process (its start fits the demo): first without keys (the loopback demo),
    then with a key made in its store while it runs (servers pick up new keys), where the login form comes
    first."""
    from selenium.webdriver.common.by import By

    store = tmp_path / "store"
    with segscore_server(tmp_path, "--demo", "--store", str(store)) as base:
        _, report = get_json(f"{base}/v1/segmentations/demo/versions/1")
        browser.get(f"{base}/console/segmentations/demo")
        assert browser.title.startswith("demo v1")
        images = wait_for_images(browser)
        charts = {src.rsplit("/", 1)[-1]: (complete, width) for src, complete, width in images if "/charts/" in src}
        assert set(charts) == {"selection.png", "map.png", "profiles.png", "history.png"}
        for name, (complete, natural_width) in charts.items():
            assert complete and natural_width >= 800, (name, natural_width)
        assert browser.execute_script(SEGMENT_ROWS) == report["k"]
        shot = save_full_page(browser, "console-segmentation.png")
        width, height = png_size(shot.read_bytes())
        assert width >= 1000 and height > 2000          # the whole page, charts included

        browser.set_window_size(1280, 1000)
        read_key = create_keys(store, {"reader": ["read"]})["reader"]
        until_authentication_is_on(base)
        browser.get(f"{base}/console/segmentations/demo")
        assert browser.find_elements(By.ID, "login") and not browser.find_elements(By.ID, "segments")
        assert browser.execute_script("return document.images.length;") == 0
        browser.find_element(By.ID, "key").send_keys(read_key)
        browser.find_element(By.CSS_SELECTOR, "#login button[type=submit]").click()
        images = wait_for_images(browser)
        assert browser.current_url == f"{base}/console/segmentations/demo"
        assert len(images) == 4 and all(complete and width >= 800 for _, complete, width in images), images
        assert browser.execute_script(SEGMENT_ROWS) == report["k"]
        # The session cookie is out of reach of page scripts (HttpOnly).
        assert "segscore" not in browser.execute_script("return document.cookie;")


def until_authentication_is_on(base: str) -> None:
    """Wait until the server refuses a request without a key (it polls its store for key changes)."""
    import time
    import urllib.error

    deadline = time.monotonic() + PAGE_LOAD_SECONDS
    while True:
        try:
            get_json(f"{base}/v1/segmentations")
        except urllib.error.HTTPError as refusal:
            assert refusal.code == 401, refusal.code
            return
        assert time.monotonic() < deadline, "the new key did not turn authentication on"
        time.sleep(0.1)
