"""The report in a real browser: loads from the file with no console error, every figure shown with a size.

Drives the system's Chromium (Debian's ``chromium`` package) through playwright; no browser
is downloaded. Skipped, with the reason, when no chromium binary or no playwright exists.
"""

import shutil
from pathlib import Path

import pytest

from test_render import render_small

#: Where Debian's chromium package puts the browser; else whatever ``chromium`` is on the PATH.
CHROMIUM = "/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else shutil.which("chromium")
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
        "--disable-background-networking", "--disable-component-update", "--disable-sync"]


@pytest.mark.skipif(CHROMIUM is None, reason="no chromium binary (apt-get install chromium)")
def test_report_renders_in_chromium_with_every_figure_visible(tmp_path):
    sync_api = pytest.importorskip("playwright.sync_api", reason="playwright is not installed (pip install playwright)")
    report = render_small(tmp_path).parent / "report.html"
    shot = tmp_path / "report.png"
    with sync_api.sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=ARGS)
        page = browser.new_page(viewport={"width": 1200, "height": 900})
        errors, requests = [], []
        page.on("console", lambda msg: errors.append(msg.text) if msg.type == "error" else None)
        page.on("pageerror", lambda exc: errors.append(str(exc)))
        page.on("request", lambda req: requests.append(req.url))
        page.goto(report.as_uri(), wait_until="load")
        images = page.eval_on_selector_all(
            "img", "els => els.map(e => [e.alt, e.complete, e.naturalWidth, e.getBoundingClientRect().width, "
            "e.getBoundingClientRect().height])")
        opened = page.eval_on_selector_all("details", "els => els.filter(e => e.open).length")
        page.screenshot(path=str(shot), full_page=True)
        browser.close()
    print(f"screenshot of the report: {shot}")
    assert errors == []
    # nothing but the file itself is fetched (figures are data: URLs)
    assert [u for u in requests if not u.startswith(("file:", "data:"))] == []
    names = {alt for alt, *_ in images}
    assert {"difference_map", "difference_curves", "timing", "animation"} <= names
    for alt, complete, natural, width, height in images:
        assert complete and natural > 0 and width > 100 and height > 50, (alt, natural, width, height)
    assert opened == 0  # warning details are folded
    assert shot.stat().st_size > 10_000
