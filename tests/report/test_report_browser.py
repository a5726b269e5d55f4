"""The QA report in a real headless browser (Debian's chromium + chromium-driver via selenium).

Every page (the index and each subject's) must load without console errors, every figure must
decode, timeline points must show their values on focus, marks made on different pages must come
out as one corrections.tsv (localStorage shared by the file:// pages of one report), and the
review queue must walk the flagged items across pages with the keyboard, also filtered by kind.
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


def _open(driver, path: Path, anchor: str = "") -> None:
    driver.get(path.resolve().as_uri() + (f"#{anchor}" if anchor else ""))


def _subject_page(report, subject: str) -> Path:
    _, index = report
    return index.parent / "report" / f"subject-{subject}.html"


@pytest.fixture
def page(browser, report):
    _, path = report
    _open(browser, path)
    browser.execute_script("window.localStorage.clear();")   # no marks from an earlier test
    _open(browser, path)
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


def _severe(driver) -> list:
    return [e for e in driver.get_log("browser") if e["level"] == "SEVERE"]


def test_pages_load_without_console_errors(browser, report):
    _, path = report
    for target in [path] + sorted((path.parent / "report").glob("subject-*.html")):
        _open(browser, target)
        assert browser.title.endswith("Lesion growth QA report"), target.name
        assert _severe(browser) == [], target.name
        assert browser.find_element(By.ID, "caution").is_displayed()
        assert browser.execute_script("return !!window.LESION_GROWTH_QUEUE;")  # queue.js loaded


def test_every_figure_decodes(browser, report):
    fixture, _ = report
    longitudinal = read_table(fixture.out / "longitudinal.tsv")
    total = 0
    for subject in ("P01", "P02"):
        _open(browser, _subject_page(report, subject))
        browser.execute_script("document.querySelectorAll('img').forEach(i => i.loading = "
                               "'eager');")
        deadline = time.monotonic() + 10
        sizes = []
        while time.monotonic() < deadline:
            sizes = browser.execute_script(
                "return Array.from(document.images).map(i => [i.complete, i.naturalWidth, "
                "i.naturalHeight]);")
            if all(done for done, _, _ in sizes):
                break
            time.sleep(0.1)
        assert sizes and all(done and w > 0 and h > 0 for done, w, h in sizes)
        points = browser.find_elements(By.CSS_SELECTOR, "svg.timeline g.pt")
        assert len(points) == int((longitudinal["subject"] == subject).sum())
        total += len(sizes)
    assert total >= 10


def test_focusing_a_timeline_point_shows_its_values(browser, report):
    _open(browser, _subject_page(report, "P01"))
    point = browser.find_elements(By.CSS_SELECTOR, "svg.timeline g.pt")[0]
    tip = point.find_element(By.CSS_SELECTOR, "text.tip")
    assert not tip.is_displayed()
    browser.execute_script("arguments[0].focus();", point)
    assert tip.is_displayed()
    assert tip.text.startswith("lesion ") and " · session " in tip.text and " mm³" in tip.text


def test_screenshot_is_not_blank(page):
    image = Image.open(io.BytesIO(page.get_screenshot_as_png())).convert("RGB")
    pixels = np.asarray(image).reshape(-1, 3)
    assert len(np.unique(pixels, axis=0)) > 20


def _wait_for(target: Path) -> None:
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline and not target.is_file():
        time.sleep(0.1)
    assert target.is_file(), "the browser did not save corrections.tsv"


def test_marks_from_every_page_give_one_corrections_file(page, report, downloads):
    fixture, index = report
    subject, _, _, session, component = fixture.low_confidence_link
    _open(page, _subject_page(report, subject))
    _controls(page, "qa-wrong", subject, session, component)[0].click()
    selects = _controls(page, "qa-move", subject, session, component)
    assert {s.get_attribute("value") for s in selects} == {"new"}   # every control agrees
    _open(page, _subject_page(report, "P02"))          # another page of the same report
    assert page.find_element(By.ID, "corrections-count-bar").text == "1"
    Select(_controls(page, "qa-move", "P02", "02", 2)[0]).select_by_value("1")
    _controls(page, "qa-note", "P02", "02", 2)[0].send_keys("looks like lesion 1")
    expected = (f"{HEADER}\n{subject}\t{session}\t{component}\tnew\t\n"
                "P02\t02\t2\t1\tlooks like lesion 1\n")
    _open(page, index)                                  # the index gathers both pages' marks
    assert _preview(page) == expected
    assert page.find_element(By.ID, "corrections-count").text == "2"
    target = downloads / "corrections.tsv"
    target.unlink(missing_ok=True)
    page.find_element(By.ID, "save-corrections").click()
    _wait_for(target)
    assert target.read_text(encoding="utf-8") == expected
    table = read_table(target)  # the project's own TSV reader accepts it
    assert list(table.columns) == ["subject", "session", "component", "lesion", "note"]
    assert table["session"].tolist() == [session, "02"]
    _open(page, _subject_page(report, subject))         # and the first page still shows its mark
    assert _controls(page, "qa-wrong", subject, session, component)[0].is_selected()


def test_unmarking_removes_the_row(page, report):
    fixture, index = report
    subject, _, _, session, component = fixture.low_confidence_link
    _open(page, _subject_page(report, subject))
    wrong = _controls(page, "qa-wrong", subject, session, component)[0]
    wrong.click()
    wrong.click()
    Select(_controls(page, "qa-move", subject, session, component)[-1]).select_by_value("2")
    assert wrong.is_selected() is False
    _open(page, index)
    assert _preview(page) == f"{HEADER}\n{subject}\t{session}\t{component}\t2\t\n"
    page.find_element(By.ID, "clear-corrections").click()
    assert _preview(page) == HEADER + "\n"
    _open(page, _subject_page(report, subject))
    assert page.find_element(By.ID, "corrections-count-bar").text == "0"


def _queue(driver) -> list[dict]:
    return driver.execute_script("return window.LESION_GROWTH_QUEUE.items;")


def _where(driver) -> tuple[str, str]:
    return (driver.execute_script("return decodeURIComponent(location.pathname)").rsplit(
        "/", 1)[-1], driver.execute_script("return location.hash;"))


def _press(driver, key: str) -> None:
    before = driver.current_url
    driver.find_element(By.TAG_NAME, "body").send_keys(key)
    deadline = time.monotonic() + 5
    while time.monotonic() < deadline and driver.current_url == before:
        time.sleep(0.05)


def test_review_queue_walks_flagged_items_across_pages(page, report):
    items = _queue(page)
    assert len(items) >= 6
    expected = [(h.split("#")[0].rsplit("/", 1)[-1], "#" + h.split("#")[1])
                for h in (i["h"] for i in items)]
    _press(page, "j")                               # from the index: the first item
    assert _where(page) == expected[0]
    for step in range(1, 4):                        # next, across pages
        _press(page, "j")
        assert _where(page) == expected[step]
        assert page.find_element(By.ID, "queue-position").text == \
            f"item {step + 1} of {len(items)}"
        ident = expected[step][1][1:]
        assert page.find_elements(By.ID, ident), ident   # the item's place is on the page
    _press(page, "k")                               # previous
    assert _where(page) == expected[2]
    page.find_element(By.ID, "queue-next").click()  # the button does what the key does
    time.sleep(0.3)
    assert _where(page) == expected[3]


def test_review_queue_filters_by_kind(page, report):
    items = _queue(page)
    merges = [i for i in items if i["k"] == "Merges"]
    assert merges
    Select(page.find_element(By.ID, "queue-kind")).select_by_value("Merges")
    _press(page, "j")
    assert _where(page)[1] == "#" + merges[0]["h"].split("#")[1]
    assert page.find_element(By.ID, "queue-position").text == f"item 1 of {len(merges)}"
    assert "Merges" in page.find_element(By.ID, "queue-current").text
    # the filter holds on the other pages of the report
    assert Select(page.find_element(By.ID, "queue-kind")).first_selected_option.text == "Merges"
