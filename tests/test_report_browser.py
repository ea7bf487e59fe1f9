"""The HTML report in a real browser: headless Chromium driven by Playwright.

Skips (with the reason) where Playwright or a Chromium binary is missing;
`.ci/run` installs both, so CI runs it.  Playwright drives the system
Chromium (`/usr/bin/chromium`, Debian's package); no browser is downloaded.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest

from designcalc.report import ReportSettings, build_report, write_report
from designcalc.scenario import load_scenario

DEMO = Path(__file__).parents[1] / "scenarios" / "lake_orrin_savings.toml"
SCREENSHOT_DIR = Path(os.environ.get("DESIGNCALC_SCREENSHOTS", "")) if os.environ.get("DESIGNCALC_SCREENSHOTS") else None


def _chromium() -> str | None:
    for name in (os.environ.get("CHROMIUM", ""), "/usr/bin/chromium", "chromium", "chromium-browser"):
        if name and (path := shutil.which(name) or (name if Path(name).is_file() else None)):
            return path
    return None


playwright_api = pytest.importorskip("playwright.sync_api", reason="Playwright is not installed (pip install -e '.[test]')")
CHROMIUM = _chromium()
pytestmark = pytest.mark.skipif(CHROMIUM is None, reason="no Chromium binary (Debian: apt-get install chromium)")


def test_report_loads_in_chromium_with_no_failed_requests_or_console_errors(tmp_path):
    """The report opens offline, makes no network request, logs no console error, shows the key answers; a screenshot is written."""
    report = build_report(
        load_scenario(DEMO),
        ReportSettings(units=(200, 400), treatment_probabilities=(0.5,), graphs=6, assignments_per_graph=5, precision=0.3, max_units=1600),
    )
    out = write_report(report, tmp_path / "appendix")
    page_url = (out / "report.html").as_uri()
    requests, failed, console_errors, page_errors = [], [], [], []
    with playwright_api.sync_playwright() as p:
        browser = p.chromium.launch(
            executable_path=CHROMIUM,
            args=["--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage", "--no-first-run", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync"],
        )
        try:
            page = browser.new_page(viewport={"width": 1200, "height": 900})
            page.on("request", lambda r: requests.append(r.url))
            page.on("requestfailed", lambda r: failed.append(f"{r.url}: {r.failure}"))
            page.on("console", lambda m: console_errors.append(m.text) if m.type == "error" else None)
            page.on("pageerror", lambda e: page_errors.append(str(e)))
            response = page.goto(page_url, wait_until="load")
            assert response is None or response.ok
            table = page.locator("table#key-answers")
            assert table.is_visible()
            assert table.locator("tbody tr").count() == 3  # direct, spillover, total at one probability
            assert "direct" in table.inner_text() and "hajek" in table.inner_text()
            assert page.locator("figure svg").count() == 4
            # Every figure is drawn with a real size (an SVG that failed to parse has none).
            for box in page.locator("figure svg").evaluate_all("els => els.map(e => e.getBoundingClientRect().height)"):
                assert box > 100
            shot = (SCREENSHOT_DIR or tmp_path) / "report.png"
            shot.parent.mkdir(parents=True, exist_ok=True)
            page.screenshot(path=str(shot), full_page=False)
            assert shot.stat().st_size > 10_000
        finally:
            browser.close()
    assert failed == [] and console_errors == [] and page_errors == []
    assert requests == [page_url]  # the page itself, nothing else
