"""The HTML report in a real headless Chromium (selenium): loads clean, images load, tables sort, nothing runs.

Needs the Debian packages ``chromium`` and ``chromium-driver`` and the ``selenium`` Python package; the
test is skipped, naming what is missing, when they are not installed. Nothing is downloaded: the driver
and browser binaries are given explicitly (selenium's own driver manager is never asked).
"""

from __future__ import annotations

import os
import shutil
import sys
import tempfile
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent))
from report_fixture import HOSTILE_CATEGORY, make_run_folder  # noqa: E402

from detdiff.report.html import write_report  # noqa: E402

CHROMIUM = Path("/usr/bin/chromium")
CHROMEDRIVER = Path("/usr/bin/chromedriver")

pytestmark = pytest.mark.browser


def _missing() -> list[str]:
    missing = []
    try:
        import selenium  # noqa: F401
    except ImportError:
        missing.append("the selenium Python package (.venv/bin/pip install selenium)")
    for binary, package in ((CHROMIUM, "chromium"), (CHROMEDRIVER, "chromium-driver")):
        if not binary.exists():
            missing.append(f"{binary} (apt-get install {package})")
    return missing


@pytest.fixture(scope="module")
def browser():
    missing = _missing()
    if missing:
        pytest.skip("headless browser test needs " + "; ".join(missing))
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    profile = tempfile.mkdtemp(prefix="detdiff-chromium-")
    options = webdriver.ChromeOptions()
    options.binary_location = str(CHROMIUM)
    for flag in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync",
                 "--disable-dev-shm-usage", "--window-size=1360,1000", f"--user-data-dir={profile}"):
        options.add_argument(flag)
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(service=Service(str(CHROMEDRIVER)), options=options)
    driver.set_page_load_timeout(30)
    try:
        yield driver
    finally:
        driver.quit()
        shutil.rmtree(profile, ignore_errors=True)


def _open(driver, page: Path) -> list[dict]:
    """Load the page, wait until every image has settled; return the browser log entries of that load."""
    from selenium.webdriver.support.ui import WebDriverWait

    driver.get_log("browser")                      # drop entries of an earlier page
    driver.get(page.resolve().as_uri())
    WebDriverWait(driver, 20).until(lambda d: d.execute_script(
        "return document.readyState === 'complete' && Array.from(document.images).every(i => i.complete);"))
    return driver.get_log("browser")


def _screenshot(driver, name: str, tmp_path: Path) -> list[Path]:
    """Full-page screenshot into tmp_path (and DETDIFF_SCREENSHOT_DIR when set)."""
    height = driver.execute_script("return document.documentElement.scrollHeight;")
    driver.set_window_size(1360, min(int(height) + 120, 16000))
    targets = [tmp_path / name]
    if os.environ.get("DETDIFF_SCREENSHOT_DIR"):
        extra = Path(os.environ["DETDIFF_SCREENSHOT_DIR"])
        extra.mkdir(parents=True, exist_ok=True)
        targets.append(extra / name)
    for target in targets:
        assert driver.save_screenshot(str(target)), target
    driver.set_window_size(1360, 1000)
    return targets


def _no_alert(driver) -> None:
    from selenium.common.exceptions import NoAlertPresentException

    with pytest.raises(NoAlertPresentException):
        driver.switch_to.alert.text


def _click(driver, css: str) -> None:
    """Scroll the element to the middle of the window (clear of the sticky header), then click it."""
    from selenium.webdriver.common.by import By

    element = driver.find_element(By.CSS_SELECTOR, css)
    driver.execute_script("arguments[0].scrollIntoView({block: 'center', behavior: 'instant'});", element)
    element.click()


def _column(driver, table_css: str, index: int) -> list[str]:
    return driver.execute_script(
        "return Array.from(document.querySelectorAll(arguments[0] + ' tbody tr'))"
        ".map(r => (r.cells[arguments[1]].getAttribute('data-v') || r.cells[arguments[1]].textContent).trim());",
        table_css, index)


def test_report_in_headless_chromium(browser, tmp_path):
    from selenium.webdriver.common.by import By

    page = write_report(make_run_folder(tmp_path), top=8)
    log = _open(browser, page)
    severe = [entry for entry in log if entry.get("level") == "SEVERE"]
    assert severe == [], severe

    # every <img> (thumbnails and plots) decoded: naturalWidth > 0 (HTML standard, HTMLImageElement)
    sources = browser.execute_script("return Array.from(document.images).map(i => i.getAttribute('src'));")
    broken = browser.execute_script(
        "return Array.from(document.images).filter(i => !(i.naturalWidth > 0)).map(i => i.getAttribute('src'));")
    assert any(s.startswith("thumbs/") for s in sources) and any(s.startswith("../plots/") for s in sources)
    assert broken == []

    # the injected category name is shown as text and never ran
    _no_alert(browser)
    assert HOSTILE_CATEGORY in browser.find_element(By.ID, "classes").text
    assert browser.execute_script("return document.querySelectorAll('script').length;") == 1

    # clicking a header sorts the table: numeric column, first click descending, second ascending
    table = "#classes table.sortable"
    before = _column(browser, table, 0)
    _click(browser, f"{table} thead th:nth-child(1) button")
    descending = _column(browser, table, 0)
    _click(browser, f"{table} thead th:nth-child(1) button")
    ascending = _column(browser, table, 0)
    assert descending != before
    assert [float(v) for v in descending] == sorted((float(v) for v in before), reverse=True)
    assert [float(v) for v in ascending] == sorted(float(v) for v in before)
    _click(browser, f"{table} thead th:nth-child(2) button")
    assert _column(browser, table, 1) == sorted(_column(browser, table, 1), key=str.casefold)

    # the detector-box toggle hides the dashed boxes
    assert browser.execute_script("return document.querySelectorAll('svg.boxes .pred rect').length;") > 0
    _click(browser, "input.toggle-pred")
    assert browser.execute_script("return document.body.classList.contains('hide-pred');")
    _click(browser, "input.toggle-pred")
    assert not browser.execute_script("return document.body.classList.contains('hide-pred');")

    _no_alert(browser)
    for shot in _screenshot(browser, "report.png", tmp_path):
        assert shot.stat().st_size > 10_000


def test_report_without_thumbnails_in_headless_chromium(browser, tmp_path):
    page = write_report(make_run_folder(tmp_path), top=4, thumbnails=False)
    log = _open(browser, page)
    assert [entry for entry in log if entry.get("level") == "SEVERE"] == []
    sources = browser.execute_script("return Array.from(document.images).map(i => i.getAttribute('src'));")
    assert sources and all(s.startswith("../plots/") for s in sources)      # plots only, no dataset pixels
    assert browser.execute_script(
        "return Array.from(document.images).every(i => i.naturalWidth > 0);")
    _no_alert(browser)
    _screenshot(browser, "report_no_thumbnails.png", tmp_path)
