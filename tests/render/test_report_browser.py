"""The report in a real browser: headless Chromium (Debian's ``chromium`` + ``chromium-driver``).

Checks that every figure loads (``naturalWidth > 0``), that every inline SVG (if any) has a
non-zero box, that nothing was fetched (the performance API lists no http(s) resource; the
page's Content-Security-Policy forbids remote loads), and saves a screenshot to the pytest tmp
folder. CI sets ``STRATAGAP_REQUIRE_BROWSER=1``: there a missing browser fails the test
instead of skipping it.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest

import stratagap
from stratagap.demo import make_shift_work_data
from stratagap.render.files import write_atomic
from stratagap.render.report import FIGURES, write_report

pytestmark = pytest.mark.browser

CHROMIUM = Path("/usr/bin/chromium")
CHROMEDRIVER = Path("/usr/bin/chromedriver")
#: Flags that keep the browser off the network and free of first-run work.
FLAGS = ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-quic",
         "--disable-default-apps", "--disable-extensions", "--window-size=1280,2000")


def _missing(reason: str):
    if os.environ.get("STRATAGAP_REQUIRE_BROWSER") == "1":
        pytest.fail(f"{reason} (STRATAGAP_REQUIRE_BROWSER=1: the browser test must run)")
    pytest.skip(reason)


@pytest.fixture(scope="module")
def driver(tmp_path_factory):
    try:
        from selenium import webdriver
        from selenium.webdriver.chrome.service import Service
    except ImportError:  # pragma: no cover - selenium is in the test extras
        _missing("selenium is not installed")
    if not (CHROMIUM.exists() and CHROMEDRIVER.exists()):
        _missing(f"{CHROMIUM} or {CHROMEDRIVER} missing: apt-get install chromium chromium-driver")
    options = webdriver.ChromeOptions()
    options.binary_location = str(CHROMIUM)
    for flag in FLAGS:
        options.add_argument(flag)
    options.add_argument(f"--user-data-dir={tmp_path_factory.mktemp('chromium-profile')}")
    browser = webdriver.Chrome(service=Service(executable_path=str(CHROMEDRIVER)), options=options)
    browser.set_page_load_timeout(60)
    yield browser
    browser.quit()


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    data = make_shift_work_data(n=800, seed=5).drop(columns=["_true_effect"])
    result = stratagap.analyze(data, exposure="shift", exposed_value="nights",
                               outcome="systolic_bp", covariates=["age", "bmi", "smoker", "role"],
                               resamples=500, seed=5)
    folder = tmp_path_factory.mktemp("browser-report")
    write_report(result, folder, write=write_atomic)
    return folder / "report.html"


def test_report_loads_offline_with_every_figure(driver, report, tmp_path):
    driver.get(report.resolve().as_uri())
    driver.execute_script("return document.readyState")
    images = driver.execute_script(
        "return Array.from(document.images).map(i => [i.dataset.figure || i.alt, i.complete, "
        "i.naturalWidth, i.naturalHeight]);")
    assert len(images) == len(FIGURES)
    for name, complete, width, height in images:
        assert complete and width > 0 and height > 0, name
    boxes = driver.execute_script(
        "return Array.from(document.querySelectorAll('svg')).map(s => {"
        "const b = s.getBoundingClientRect(); return [b.width, b.height]; });")
    for width, height in boxes:
        assert width > 0 and height > 0
    sections = driver.execute_script(
        "return Array.from(document.querySelectorAll('section[data-section]'))"
        ".map(s => [s.dataset.section, s.getBoundingClientRect().height]);")
    assert len(sections) == 11 and all(h > 0 for _s, h in sections)
    fetched = driver.execute_script(
        "return performance.getEntriesByType('resource').map(e => e.name)"
        ".concat(performance.getEntriesByType('navigation').map(e => e.name));")
    remote = [u for u in fetched if u.startswith(("http:", "https:"))]
    assert not remote, remote
    # Chromium logs every load the policy refused: none means nothing remote was even tried.
    assert not [e for e in driver.get_log("browser") if "Content Security Policy" in e["message"]]
    shot = tmp_path / "report.png"
    height = driver.execute_script("return document.body.scrollHeight")
    driver.set_window_size(1280, min(int(height), 16000))
    assert driver.save_screenshot(str(shot))
    assert shot.stat().st_size > 10_000
    keep = os.environ.get("STRATAGAP_SCREENSHOT_DIR")
    if keep:  # CI can collect it as an artifact
        shutil.copy(shot, Path(keep) / "report.png")


def test_csp_blocks_a_remote_image(driver, tmp_path):
    """The policy really forbids remote loads: an injected http image is refused, not fetched."""
    page = tmp_path / "probe.html"
    from stratagap.render.report.html import CSP
    page.write_text(f'<!DOCTYPE html><meta http-equiv="Content-Security-Policy" content="{CSP}">'
                    '<img id="x" src="http://127.0.0.1:9/never.png"><p>probe</p>', "utf-8")
    driver.get(page.as_uri())
    state = driver.execute_script(
        "const i = document.getElementById('x'); return [i.complete, i.naturalWidth];")
    assert state[1] == 0
    blocked = [e["message"] for e in driver.get_log("browser") if "Content Security Policy" in e["message"]]
    assert blocked and "never.png" in blocked[0] and "blocked" in blocked[0]
