"""The demo-like report opened in a real headless Chromium: figures load, nothing leaves the page.

Needs the Debian packages ``chromium`` and ``chromium-driver`` (installed by ``.ci/run``) and the
``selenium`` package; skipped with the reason when one is missing. Screenshots (and a PDF print)
are saved under ``test-artifacts/`` at the repository root (git-ignored) for a person to look at.
"""

from __future__ import annotations

import base64
import shutil
from pathlib import Path

import pytest

from report_support import loop_check, loop_page

pytestmark = pytest.mark.slow

CHROMIUM = Path("/usr/bin/chromium")
CHROMEDRIVER = Path("/usr/bin/chromedriver")
ARTIFACTS = Path(__file__).resolve().parent.parent / "test-artifacts"

# Measured inside the page, so the numbers are the browser's own.
_PAGE_FACTS = """
const images = Array.from(document.images);
const svgs = Array.from(document.querySelectorAll('svg'));
const resources = performance.getEntriesByType('resource').map(e => e.name);
const navigation = performance.getEntriesByType('navigation').map(e => e.name);
const verdict = document.getElementById('verdict');
return {
  images: images.map(i => ({alt: i.alt, complete: i.complete, natural: i.naturalWidth,
                            naturalHeight: i.naturalHeight,
                            shown: i.getBoundingClientRect().width})),
  svgs: svgs.map(s => s.getBoundingClientRect().width),
  requests: resources.concat(navigation),
  verdictText: verdict ? verdict.textContent.trim() : null,
  verdictData: verdict ? verdict.dataset.verdict : null,
  rows: document.querySelectorAll('table.scorecard tbody tr').length,
  firstRowVerdict: (document.querySelector('table.scorecard tbody tr td:last-child') || {})
                   .textContent,
  scrollWidth: document.documentElement.scrollWidth,
  innerWidth: window.innerWidth,
  height: document.documentElement.scrollHeight,
};
"""


@pytest.fixture(scope="module")
def browser(tmp_path_factory):
    if not (CHROMIUM.exists() and CHROMEDRIVER.exists()):
        pytest.skip(
            "headless browser test needs /usr/bin/chromium and /usr/bin/chromedriver "
            "(Debian packages chromium and chromium-driver; .ci/run installs them)"
        )
    webdriver = pytest.importorskip("selenium.webdriver")
    from selenium.webdriver.chrome.service import Service

    options = webdriver.ChromeOptions()
    options.binary_location = str(CHROMIUM)
    profile = tmp_path_factory.mktemp("chromium-profile")
    for argument in (
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--no-first-run",
        "--disable-quic",
        "--disable-dev-shm-usage",
        f"--user-data-dir={profile}",
        "--window-size=1280,900",
    ):
        options.add_argument(argument)
    driver = webdriver.Chrome(service=Service(str(CHROMEDRIVER)), options=options)
    driver.set_page_load_timeout(60)
    try:
        yield driver
    finally:
        driver.quit()


def _open(driver, path: Path) -> dict:
    driver.get(path.resolve().as_uri())  # returns after the load event: images decoded
    return driver.execute_script(_PAGE_FACTS)


def _save_artifacts(driver, facts: dict, stem: str, tmp_path: Path, *, pdf: bool) -> Path:
    """Full-page screenshot (and a PDF print) under test-artifacts/, falling back to tmp_path."""
    driver.set_window_size(1280, min(int(facts["height"]) + 120, 16000))
    try:
        ARTIFACTS.mkdir(exist_ok=True)
        folder = ARTIFACTS
    except OSError:
        folder = tmp_path
    shot = folder / f"{stem}.png"
    assert driver.save_screenshot(str(shot))
    if pdf:
        printed = driver.execute_cdp_cmd("Page.printToPDF", {"printBackground": True})
        document = base64.b64decode(printed["data"])
        assert document.startswith(b"%PDF") and len(document) > 50_000
        (folder / f"{stem}.pdf").write_bytes(document)
    driver.set_window_size(1280, 900)
    return shot


@pytest.mark.parametrize("rho", [28.0, 22.0])
def test_report_in_headless_chromium(browser, tmp_path, rho):
    result, _ = loop_check(rho)
    page = tmp_path / "report.html"
    page.write_text(loop_page(rho), encoding="utf-8")
    facts = _open(browser, page)

    # Every figure decoded with a real size, and is shown with a non-zero width.
    assert len(facts["images"]) == 6
    for image in facts["images"]:
        assert image["complete"] and image["natural"] > 0 and image["naturalHeight"] > 0, image
        assert image["shown"] > 0, image
    assert all(width > 0 for width in facts["svgs"])
    # No request left the page: the only entry is the file itself.
    assert not [url for url in facts["requests"] if url.startswith(("http:", "https:"))]
    assert all(url.startswith(("file:", "data:")) for url in facts["requests"]), facts["requests"]
    # The verdict on screen is the scorecard's (text-transform does not change textContent).
    assert facts["verdictData"] == result.scorecard.verdict
    assert facts["verdictText"].lower() == result.scorecard.verdict
    assert facts["rows"] == len(result.scorecard.rows)
    if result.scorecard.verdict == "fail":
        assert facts["firstRowVerdict"].strip().lower() == "fail"
    # Readable on a laptop: no sideways scrolling at 1280 pixels.
    assert facts["scrollWidth"] <= facts["innerWidth"]

    # Printable: Chromium's own print to PDF of the true model's page (the print style sheet).
    shot = _save_artifacts(browser, facts, f"report-rho{rho:g}", tmp_path, pdf=rho == 28.0)
    assert shot.stat().st_size > 10_000
    if shot.parent == ARTIFACTS:
        shutil.copyfile(page, shot.with_suffix(".html"))
