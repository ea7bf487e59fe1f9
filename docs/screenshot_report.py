"""Screenshot a report's key answers and first figure in headless Chromium (the README picture).

Usage: python docs/screenshot_report.py REPORT_DIR OUT.png

Needs Playwright (in the test extras) and Debian's Chromium at /usr/bin/chromium
(or the path in $CHROMIUM); no browser is downloaded.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

from playwright.sync_api import sync_playwright


def main(report_dir: str, out: str) -> None:
    page_url = (Path(report_dir) / "report.html").absolute().as_uri()
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=os.environ.get("CHROMIUM", "/usr/bin/chromium"), args=["--no-sandbox", "--disable-gpu"])
        page = browser.new_page(viewport={"width": 1150, "height": 900})
        page.goto(page_url, wait_until="load")
        top = page.locator("#answers").bounding_box()
        bottom = page.locator("#figure-power_curves").bounding_box()
        page.screenshot(path=out, full_page=True, clip={"x": 0, "y": top["y"] - 10, "width": 1150, "height": bottom["y"] + bottom["height"] - top["y"] + 20})
        browser.close()


if __name__ == "__main__":
    if len(sys.argv) != 3:
        sys.exit(__doc__)
    main(sys.argv[1], sys.argv[2])
