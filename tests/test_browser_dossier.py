"""The HTML dossier and site in a real headless Chromium: figures render, nothing leaves the file, hostile text
stays inert, and the page prints.

Needs Debian's `chromium` and `chromium-driver` packages and selenium. Without them the test skips, unless the
environment variable CI is set, in which case it fails: CI must exercise the browser.
"""

from __future__ import annotations

import base64
import dataclasses
import json
import os
import re
import shutil
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from ivdossier.reports.dossier import dossier_html
from ivdossier.reports.inputs import CatalogEntry, InstrumentInfo
from ivdossier.reports.sample import PROGRAM, make_run, sample_input
from ivdossier.reports.site import build_site
from ivdossier.workflows.verdicts import with_verdicts

pytestmark = pytest.mark.browser

ARTIFACTS = Path(__file__).resolve().parents[1] / "test-artifacts"
HOSTILE_CLAIM = (
    "<script>document.title='pwned'; window.__pwned = 1;</script> "
    "<img src=x onerror=\"window.__pwned = 2; document.title = 'pwned'\"> "
    "[open me](javascript:window.__pwned=3)"
)
CHROME_FLAGS = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--window-size=1280,1000",
)


def _binaries() -> tuple[str | None, str | None]:
    browser = next(
        (p for n in ("chromium", "chromium-browser", "google-chrome") if (p := shutil.which(n))), None
    )
    return browser, shutil.which("chromedriver")


def _missing(reason: str) -> None:
    if os.environ.get("CI"):
        pytest.fail(
            f"{reason}; CI is set, so the browser test must run (install chromium and chromium-driver)."
        )
    pytest.skip(f"{reason}; install Debian's chromium and chromium-driver to run this test (CI unset).")


@pytest.fixture(scope="module")
def driver(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Any]:
    try:
        from selenium import webdriver
        from selenium.webdriver.chrome.service import Service
    except ImportError:
        _missing("selenium is not installed")
    browser, chromedriver = _binaries()
    if browser is None or chromedriver is None:
        _missing(f"headless Chromium not found (chromium: {browser}, chromedriver: {chromedriver})")
    options = webdriver.ChromeOptions()
    options.binary_location = str(browser)
    for flag in CHROME_FLAGS:
        options.add_argument(flag)
    options.add_argument(f"--user-data-dir={tmp_path_factory.mktemp('chrome-profile')}")
    options.set_capability("goog:loggingPrefs", {"performance": "ALL", "browser": "ALL"})
    drv = webdriver.Chrome(service=Service(str(chromedriver)), options=options)
    drv.set_page_load_timeout(30)
    # leave the browser's start page before any test reads the request log: its own chrome:// loads would
    # otherwise race into the log of the first page a test opens
    drv.get("about:blank")
    drv.get_log("performance")
    try:
        yield drv
    finally:
        drv.quit()


def _hostile_input() -> Any:
    base = sample_input(n_links=6, n_runs=3)
    claims = dict(base.instrument.claims)
    claims["exclusion"] = HOSTILE_CLAIM
    return with_verdicts(
        dataclasses.replace(base, instrument=dataclasses.replace(base.instrument, claims=claims))
    )


def _requested_urls(drv: Any) -> list[str]:
    urls = []
    for entry in drv.get_log("performance"):
        message = json.loads(entry["message"])["message"]
        if message.get("method") == "Network.requestWillBeSent":
            urls.append(message["params"]["request"]["url"])
    urls += drv.execute_script("return performance.getEntriesByType('resource').map(e => e.name)")
    return urls


def _full_screenshot(drv: Any, path: Path) -> None:
    height = int(drv.execute_script("return document.documentElement.scrollHeight"))
    drv.set_window_size(1280, min(max(height, 800), 14000))
    path.parent.mkdir(parents=True, exist_ok=True)
    drv.save_screenshot(str(path))
    drv.set_window_size(1280, 1000)


def test_dossier_renders_figures_offline_and_keeps_hostile_text_inert(driver: Any, tmp_path: Path) -> None:
    page = tmp_path / "dossier.html"
    page.write_text(dossier_html(_hostile_input()), encoding="utf-8")
    driver.get_log("performance")  # drop anything logged before this page
    driver.get(page.as_uri())

    # the hostile claim is shown as text and never ran
    assert driver.title == "Dossier: Fibre rollout wave"
    assert driver.execute_script("return typeof window.__pwned") == "undefined"
    body_text = driver.execute_script("return document.body.innerText")
    assert "<script>document.title='pwned'; window.__pwned = 1;</script>" in body_text
    assert "[open me](javascript:window.__pwned=3)" in body_text
    assert driver.execute_script("return document.querySelectorAll('main script, img').length") == 0
    assert driver.execute_script("return document.querySelectorAll('a[href^=\"javascript:\"]').length") == 0

    # three figures (diagram, first stage, AR curve) drawn with real size
    boxes = driver.execute_script(
        "return Array.from(document.querySelectorAll('figure.figure > svg')).map(s => {"
        "const r = s.getBoundingClientRect(); return [s.parentElement.id, r.width, r.height]; })"
    )
    assert sorted(b[0] for b in boxes) == ["figure-ar-curve", "figure-causal-diagram", "figure-first-stage"]
    assert all(w > 100 and h > 50 for _, w, h in boxes), boxes
    # the AR curve actually drew its line inside the box, and its axis labels are real text
    n_vertices, width, height = driver.execute_script(
        "const l = document.querySelector('#figure-ar-curve polyline.line');"
        "const r = l.getBoundingClientRect(); return [l.points.numberOfItems, r.width, r.height];"
    )
    assert n_vertices > 10 and width > 100 and height > 20, (n_vertices, width, height)
    ticks = driver.execute_script(
        "return Array.from(document.querySelectorAll('#figure-ar-curve text.tick-x')).map(t => t.textContent)"
    )
    assert len(ticks) >= 3 and all(t.strip() for t in ticks), ticks
    # every verdict badge shows a shape and its word
    badges = driver.execute_script(
        "return Array.from(document.querySelectorAll('.badge')).map(b => {"
        "const r = b.querySelector('svg').getBoundingClientRect(); return [b.innerText.trim(), r.width]; })"
    )
    assert len(badges) == 8
    assert all(word in ("holds", "at risk", "broken", "not assessed") and w > 5 for word, w in badges), badges

    urls = _requested_urls(driver)
    assert urls, "the performance log recorded no request at all"
    assert all(u.startswith(("file:", "data:")) for u in urls), urls

    _full_screenshot(driver, ARTIFACTS / "dossier.png")
    assert (ARTIFACTS / "dossier.png").stat().st_size > 10_000


def test_dossier_prints_to_clean_pages(driver: Any, tmp_path: Path) -> None:
    page = tmp_path / "dossier.html"
    page.write_text(dossier_html(with_verdicts(sample_input(n_links=4, n_runs=2))), encoding="utf-8")
    driver.get(page.as_uri())
    driver.execute_cdp_cmd("Emulation.setEmulatedMedia", {"media": "print"})
    try:
        toc_display = driver.execute_script("return getComputedStyle(document.querySelector('.toc')).display")
        background = driver.execute_script("return getComputedStyle(document.body).backgroundColor")
    finally:
        driver.execute_cdp_cmd("Emulation.setEmulatedMedia", {"media": ""})
    assert toc_display == "none"
    assert background in ("rgb(255, 255, 255)", "rgba(0, 0, 0, 0)")
    pdf = base64.b64decode(driver.execute_cdp_cmd("Page.printToPDF", {"preferCSSPageSize": True})["data"])
    assert pdf.startswith(b"%PDF")
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    (ARTIFACTS / "dossier.pdf").write_bytes(pdf)
    pages = len(re.findall(rb"/Type\s*/Page(?!s)", pdf))
    assert 2 <= pages <= 40, pages


def test_site_index_links_through_to_a_dossier(driver: Any, tmp_path: Path) -> None:
    mast = dataclasses.replace(
        sample_input(n_links=2, n_runs=1),
        instrument=InstrumentInfo(slug="mast", name="Mast distance", family="distance", state="candidate"),
        runs=(make_run(1, plots=False),),
    )
    entries = [CatalogEntry("TH-017", "Broadband also brings online pharmacy", "exclusion")]
    build_site(tmp_path / "site", [PROGRAM], [_hostile_input(), with_verdicts(mast)], entries)
    driver.get_log("performance")
    driver.get((tmp_path / "site" / "index.html").as_uri())
    assert driver.title == "Instrument dossiers"
    driver.find_element("link text", PROGRAM.title).click()
    assert driver.title == f"Program: {PROGRAM.title}"
    rows = driver.execute_script("return document.querySelectorAll('tbody tr').length")
    assert rows == 2
    _full_screenshot(driver, ARTIFACTS / "site-program.png")
    driver.find_element("link text", "Fibre rollout wave").click()
    assert driver.title == "Dossier: Fibre rollout wave"
    assert driver.execute_script("return typeof window.__pwned") == "undefined"
    boxes = driver.execute_script(
        "return Array.from(document.querySelectorAll('figure svg')).map(s => s.getBoundingClientRect().height)"
    )
    assert len(boxes) == 3 and min(boxes) > 50
    urls = _requested_urls(driver)
    assert urls and all(u.startswith(("file:", "data:")) for u in urls), urls


def _wide_comparison(tmp_path: Path) -> Path:
    """A program of five candidates with long names, long threat titles and real estimates, one of them weak
    with an Anderson-Rubin set of two rays (the widest cell the table can hold)."""
    from ivdossier.reports.inputs import LinkInfo, Rating
    from ivdossier.workflows.sample import sample_result, sample_run

    dossiers = []
    for i in range(5):
        strength, seed = (0.05, 1) if i == 0 else (0.6, i)  # seed 1 at 0.05: AR set (−∞, 0.549] ∪ [1.278, ∞)
        run = sample_run(1, sample_result(strength=strength, seed=seed, instruments=("fibre_wave",)))
        base = dataclasses.replace(sample_input(n_links=3, n_runs=1), runs=(run,))
        long_link = LinkInfo(
            threat_code=f"TH-LONG-{i:02d}",
            title="Roll-out schedule follows district income, which also shapes emergency use through many paths",
            condition="exogeneity",
            state="open",
            ratings=(Rating("ana", 5, 5),),
        )
        dossiers.append(
            with_verdicts(
                dataclasses.replace(
                    base,
                    instrument=InstrumentInfo(
                        slug=f"candidate-{i}",
                        name=f"Months since the regional fibre roll-out reached the postal district, variant {i}",
                        family="timing-of-entry-or-rollout-schedule",
                        state="under review by the whole team",
                        claims=base.instrument.claims,
                    ),
                    links=(*base.links, long_link),
                )
            )
        )
    root = tmp_path / "site"
    build_site(root, [PROGRAM], dossiers, [])
    return root / "programs" / "telehealth-ed" / "index.html"


def test_the_comparison_table_needs_no_horizontal_scroll_at_1280_px(driver: Any, tmp_path: Path) -> None:
    page = _wide_comparison(tmp_path)
    driver.set_window_size(1280, 1000)
    driver.get(page.as_uri())
    width = driver.execute_script("return window.innerWidth")
    assert width <= 1280
    doc = driver.execute_script("return document.documentElement.scrollWidth")
    assert doc <= width, f"the page scrolls sideways: {doc} px of content in a {width} px window"
    wraps = driver.execute_script(
        "return Array.from(document.querySelectorAll('.table-wrap')).map(w => [w.scrollWidth, w.clientWidth])"
    )
    assert wraps and all(scroll <= client for scroll, client in wraps), wraps
    cells = driver.execute_script(
        "return Array.from(document.querySelectorAll('tbody tr')).map(r => r.lastElementChild.innerText)"
    )
    assert len(cells) == 5 and "∪" in "".join(cells), cells  # the two-ray AR set is in the table
    # every badge still shows its shape and its whole word on one line
    badges = driver.execute_script(
        "return Array.from(document.querySelectorAll('tbody .badge')).map(b => b.getClientRects().length)"
    )
    assert len(badges) == 5 * 4 and all(n == 1 for n in badges), badges
    _full_screenshot(driver, ARTIFACTS / "site-comparison-1280.png")
