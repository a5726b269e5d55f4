"""The QA report in a real headless browser (Debian's chromium + chromium-driver via selenium).

The page must load without console errors, every figure must decode, a screenshot must not be
blank, and the review controls must produce the corrections.tsv rows a reviewer asked for.
Skips with a reason when chromium, chromedriver or selenium is not installed
(``apt-get install chromium chromium-driver``; ``pip install selenium``).
"""
from __future__ import annotations

import io
import shutil
import time
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from pipeline.report.build import write_report
from pipeline.io.tsv import read_table
from tests.report_fixtures import ReportFixture, build_report_folder

try:
    from selenium import webdriver
    from selenium.common.exceptions import WebDriverException
    from selenium.webdriver.chrome.service import Service
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import Select
except ImportError:  # pragma: no cover - depends on the machine
    webdriver = None

CHROMIUM = next((p for p in (shutil.which("chromium"), shutil.which("chromium-browser"),
                             "/usr/bin/chromium") if p and Path(p).is_file()), None)
DRIVER = next((p for p in ("/usr/bin/chromedriver", shutil.which("chromedriver"))
               if p and Path(p).is_file()), None)

pytestmark = [
    pytest.mark.skipif(webdriver is None,
                       reason="selenium is not installed (pip install selenium)"),
    pytest.mark.skipif(CHROMIUM is None,
                       reason="chromium is not installed (apt-get install chromium)"),
    pytest.mark.skipif(DRIVER is None,
                       reason="chromedriver is not installed (apt-get install chromium-driver)"),
]

HEADER = "subject\tsession\tcomponent\tlesion\tnote"


@pytest.fixture(scope="module")
def report(tmp_path_factory) -> tuple[ReportFixture, Path]:
    fixture = build_report_folder(tmp_path_factory.mktemp("browser"))
    return fixture, write_report(fixture.out)


@pytest.fixture(scope="module")
def downloads(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("downloads")


@pytest.fixture(scope="module")
def browser(tmp_path_factory, downloads):
    options = webdriver.ChromeOptions()
    options.binary_location = CHROMIUM
    for flag in ("--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run",
                 "--window-size=1200,900",
                 f"--user-data-dir={tmp_path_factory.mktemp('chromium-profile')}"):
        options.add_argument(flag)
    options.add_experimental_option("prefs", {
        "download.default_directory": str(downloads), "download.prompt_for_download": False,
        "download.directory_upgrade": True, "safebrowsing.enabled": False})
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    try:  # Service with an explicit path: selenium never tries to download a driver
        driver = webdriver.Chrome(service=Service(executable_path=DRIVER), options=options)
    except WebDriverException as exc:  # pragma: no cover - depends on the machine
        pytest.skip(f"chromium could not be started here: {str(exc).splitlines()[0]}")
    driver.set_page_load_timeout(20)
    try:
        driver.execute_cdp_cmd("Browser.setDownloadBehavior",
                               {"behavior": "allow", "downloadPath": str(downloads)})
    except WebDriverException:
        pass  # the download directory from the preferences applies
    yield driver
    driver.quit()


@pytest.fixture
def page(browser, report):
    _, path = report
    browser.get(path.resolve().as_uri())  # a fresh page: no marks from an earlier test
    return browser


def _controls(driver, cls: str, subject: str, session: str, component: int):
    selector = (f".{cls}[data-subject='{subject}'][data-session='{session}']"
                f"[data-component='{component}']")
    found = driver.find_elements(By.CSS_SELECTOR, selector)
    assert found, selector
    for element in found:
        driver.execute_script("arguments[0].scrollIntoView({block: 'center'});", element)
    return found


def _preview(driver) -> str:
    return driver.find_element(By.ID, "corrections-preview").get_attribute("textContent")


def test_page_loads_without_console_errors(browser, report):
    _, path = report
    browser.get(path.resolve().as_uri())
    assert browser.title == "Lesion growth QA report"
    severe = [e for e in browser.get_log("browser") if e["level"] == "SEVERE"]
    assert severe == []
    assert browser.find_element(By.ID, "caution").is_displayed()


def test_every_figure_decodes(page):
    sizes = page.execute_script(
        "return Array.from(document.images).map(i => [i.complete, i.naturalWidth, "
        "i.naturalHeight]);")
    assert len(sizes) == 8
    assert all(done and width > 0 and height > 0 for done, width, height in sizes)


def test_screenshot_is_not_blank(page):
    image = Image.open(io.BytesIO(page.get_screenshot_as_png())).convert("RGB")
    pixels = np.asarray(image).reshape(-1, 3)
    assert len(np.unique(pixels, axis=0)) > 20


def test_marking_a_link_wrong_and_saving_gives_corrections(page, report, downloads):
    fixture, _ = report
    subject, _, _, session, component = fixture.low_confidence_link
    wrong = _controls(page, "qa-wrong", subject, session, component)[0]
    wrong.click()
    move = _controls(page, "qa-move", "P02", "02", 2)[0]
    Select(move).select_by_value("1")
    note = _controls(page, "qa-note", "P02", "02", 2)[0]
    note.send_keys("looks like lesion 1")
    expected = (f"{HEADER}\n{subject}\t{session}\t{component}\tnew\t\n"
                "P02\t02\t2\t1\tlooks like lesion 1\n")
    assert _preview(page) == expected
    # every control of that component shows the same choice
    selects = _controls(page, "qa-move", subject, session, component)
    assert {s.get_attribute("value") for s in selects} == {"new"}
    assert page.find_element(By.ID, "corrections-count").text == "2"
    target = downloads / "corrections.tsv"
    target.unlink(missing_ok=True)
    page.find_element(By.ID, "save-corrections").click()
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline and not target.is_file():
        time.sleep(0.1)
    assert target.is_file(), "the browser did not save corrections.tsv"
    assert target.read_text(encoding="utf-8") == expected
    table = read_table(target)  # the project's own TSV reader accepts it
    assert list(table.columns) == ["subject", "session", "component", "lesion", "note"]
    assert table["session"].tolist() == [session, "02"]


def test_unmarking_removes_the_row(page, report):
    fixture, _ = report
    subject, _, _, session, component = fixture.low_confidence_link
    wrong = _controls(page, "qa-wrong", subject, session, component)[0]
    wrong.click()
    assert _preview(page).count("\n") == 2
    wrong.click()
    assert _preview(page) == HEADER + "\n"
    Select(_controls(page, "qa-move", subject, session, component)[-1]).select_by_value("2")
    assert wrong.is_selected() is False
    assert _preview(page) == f"{HEADER}\n{subject}\t{session}\t{component}\t2\t\n"
    page.find_element(By.ID, "clear-corrections").click()
    assert _preview(page) == HEADER + "\n"
